"""The descriptor-kind registry and the shared constants: one definition, read everywhere."""

import pytest

from cvdesign.cli import build_parser
from cvdesign.constants import BOLTZMANN_KJ_MOL_K, COORDINATION_R0_NM
from cvdesign.errors import InputError
from cvdesign.kinds import ATOM_KINDS, DEFAULT_KINDS, GROUP_KINDS, KINDS
from cvdesign.pool import Descriptor
from cvdesign.spec import spec_schema

# The keys every spec descriptor has, whatever its kind.
COMMON_KEYS = {"id", "kind", "label", "atom_identities", "periodic"}


def test_boltzmann_constant_is_codata():
    # k_B N_A = 1.380649e-23 J/K * 6.02214076e23 /mol (exact, SI 2019), in kJ/mol/K.
    assert BOLTZMANN_KJ_MOL_K == pytest.approx(1.380649e-23 * 6.02214076e23 / 1000, rel=1e-15)


def test_registry_partitions_the_kinds_into_atom_and_group_kinds():
    assert set(ATOM_KINDS) | set(GROUP_KINDS) == set(KINDS)
    assert not set(ATOM_KINDS) & set(GROUP_KINDS)
    assert set(DEFAULT_KINDS) <= set(KINDS)
    for name, kind in KINDS.items():
        assert kind.name == name
        assert set(kind.features) <= set(kind.transforms)


def test_schema_kinds_and_keys_are_the_registry():
    descriptor = spec_schema()["$defs"]["descriptor"]
    assert descriptor["properties"]["kind"]["enum"] == list(KINDS)
    specific = set(descriptor["properties"]) - COMMON_KEYS
    for rule in descriptor["allOf"]:
        condition = rule["if"]["properties"]["kind"]
        names = condition.get("enum", [condition.get("const")])
        then = rule["then"]
        absent = {k for k, v in then.get("properties", {}).items()
                  if v == {"$ref": "#/$defs/absent"}}
        for name in names:
            assert set(KINDS[name].spec_keys) == specific - absent, name
            assert set(then["required"]) <= set(KINDS[name].spec_keys), name
    atom_rule = next(r for r in descriptor["allOf"] if "enum" in r["if"]["properties"]["kind"])
    assert atom_rule["if"]["properties"]["kind"]["enum"] == list(ATOM_KINDS)


def test_pool_descriptors_take_their_properties_from_the_registry():
    for name, kind in KINDS.items():
        if kind.on_groups:
            d = Descriptor(name, (), "x", groups=((0, 1), (2,)), r0=0.5)
        else:
            d = Descriptor(name, tuple(range(kind.n_atoms)), "x")
        assert (d.periodic, d.transforms, d.unit) == (kind.periodic, kind.features, kind.unit)
    with pytest.raises(InputError, match="an angle takes 3 atoms; got 2"):
        Descriptor("angle", (0, 1), "x")


def test_cli_accepts_exactly_the_registry_kinds_with_the_shared_defaults():
    parser = build_parser()
    base = ["suggest", "--topology", "t.pdb", "--state", "a", "a.xtc", "--state", "b", "b.xtc",
            "--out", "o"]
    args = parser.parse_args(base)
    assert args.kinds == DEFAULT_KINDS and args.coordination_r0 == COORDINATION_R0_NM
    assert parser.parse_args(base + ["--kinds", ",".join(KINDS)]).kinds == tuple(KINDS)
    with pytest.raises(SystemExit):
        parser.parse_args(base + ["--kinds", "distance,torsion"])
