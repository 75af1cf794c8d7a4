"""Phantom definitions: the shipped ones load; bad ones are refused with file, line, field."""

import pytest

from qa import PROJECT_ROOT
from qa.errors import InputError
from qa.phantom import load_phantom
from qa.phantom.materials import linear_attenuation

DEMO = (PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml").read_text()


def test_demo_phantom_loads():
    ph = load_phantom(PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml")
    assert ph.background.id == "slab"
    assert {o.role for o in ph.objects} >= {"bead", "edge", "disk", "uniform"}
    assert len(ph.with_role("disk")) == 4


def test_attenuation_from_xraydb_tables():
    # xraydb (Elam tables) for water at 20 keV: 0.8098 1/cm (read from xraydb
    # 4.5.8, material_mu('water', 20000)), i.e. 0.081 1/mm; aluminium 9.293 1/cm.
    assert linear_attenuation("water", 20.0) == pytest.approx(0.08098, rel=1e-3)
    assert linear_attenuation("aluminium", 20.0) == pytest.approx(0.9293, rel=1e-3)
    # A mixture lies between its parts.
    a, b = linear_attenuation("adipose-icru44", 20.0), linear_attenuation("breast-icru44", 20.0)
    assert a < linear_attenuation("mix:adipose-icru44:0.5,breast-icru44:0.5", 20.0) < b


@pytest.mark.parametrize("old,new,match", [
    ("shape: sphere", "shape: pyramid", r"lacuna-dbt-demo.yaml:31, field 'objects\[1\].shape': expected one of"),
    ("    radius_mm: 0.5\n", "", r"field 'objects\[1\]': missing required field 'objects\[1\].radius_mm'"),
    ("role: bead", "role: widget", r"field 'objects\[1\].role': expected one of"),
    ("material: aluminium", "material: unobtainium", r"unknown material 'unobtainium'"),
    ("centre_mm: [-12, 9, 20.5]", "centre_mm: [-10, 26, 20.5]", r"objects 'edge' and 'bead' overlap|objects 'bead' and 'edge' overlap"),
    ("centre_mm: [-12, 9, 20.5]", "centre_mm: [-12, 9, 45]", r"object 'bead' reaches outside the background"),
    ("energy_keV: 20", "energy_keV: twenty", r"field 'energy_keV': expected a number"),
    ("phantom: lacuna-tern", "phantom: !!python/object/apply:os.system [ls]", r"YAML tag not allowed"),
    ("  - id: d3\n", "  - id: d6\n", r"object id 'd6' is already used"),
])
def test_bad_definitions(tmp_path, old, new, match):
    assert old in DEMO
    p = tmp_path / "lacuna-dbt-demo.yaml"
    p.write_text(DEMO.replace(old, new, 1))
    with pytest.raises(InputError, match=match):
        load_phantom(p)
