"""Exports of a spec to simulation engines' own formats.

``openmm``: the CV as an ``openmm.CustomCVForce`` and the funnel restraint as an
``openmm.CustomCentroidBondForce`` (:meth:`cvdesign.Spec.to_openmm`,
:meth:`cvdesign.Spec.restraint_to_openmm`, ``cvdesign export SPEC --to openmm``).
OpenMM is an optional dependency (``pip install 'cvdesign[openmm]'``), imported
only when an export runs. Import from the module (``cvdesign.export.openmm``).
"""
