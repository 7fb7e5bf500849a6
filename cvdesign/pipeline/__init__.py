"""The main jobs: ``suggest`` (:mod:`.suggest`) and ``propose_states`` (:mod:`.explore`).

Both are importable from :mod:`cvdesign`; the other names from their modules.
"""
