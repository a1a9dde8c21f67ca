"""Flow Direction (260674002, SCT) of post-coordinated measurements: TID 5200 takes its values
from CID 12221 Flow Direction, TID 5302 from CID 12306 (DICOM PS3.16; pydicom's bundled CID
tables, checked below).  Backward flow at the tricuspid valve is the TR jet; backward flow at
the mitral valve (mitral regurgitation) or in the pulmonary veins (the atrial reversal wave) is
never read as the E, A, S or D wave."""

from __future__ import annotations

import pytest
from pydicom.sr._cid_dict import cid_concepts
from pydicom.sr._concepts_dict import concepts

from service.model import Code, Measure
from service.pipeline import GradeOptions, grade_study
from service.sr.echo_builder import EchoItem, build_echo_sr, code_item, num_item
from service.sr.read import read_document
from service.vocabulary.mapper import build_measurements, load_mapping_table
from service.vocabulary.measures import Component
from service.vocabulary.standard import code

TABLE = load_mapping_table(())
PRIVATE = Code(value="HV-PBV", scheme="99HVCC", meaning="Peak velocity")  # invented row-1 code

REGURGITANT = Code(value="397417004", scheme="SCT", meaning="Regurgitant Flow")
RETROGRADE = Code(value="312004007", scheme="SCT", meaning="Retrograde Direction")
ANTEGRADE = Code(value="263677008", scheme="SCT", meaning="Antegrade Direction")
CW = Code(value="261198000", scheme="SCT", meaning="Doppler Continuous Wave")


def test_the_flow_direction_codes_are_those_of_ps3_16():
    # PS3.16 CID 12306 (TID 5302) and CID 12221 (TID 5200), as bundled in pydicom
    sct = concepts["SCT"]
    by_code = {
        v: name for name, entry in sct.items() for v in entry if v in ("263677008", "312004007")
    }
    assert set(by_code) == {"263677008", "312004007"}
    assert {"RetrogradeDirection", "AntegradeDirection"} <= set(cid_concepts[12306]["SCT"])
    assert {"RetrogradeFlow", "AntegradeFlow", "RegurgitantFlow"} <= set(cid_concepts[12221]["SCT"])
    assert sct["RetrogradeDirection"]["312004007"][1] == [12306]
    assert sct["RegurgitantFlow"]["397417004"][1] == [12221]


def _tid5302(site: str, direction: Code | None, *, phase: str | None = None, value=3.1):
    """A TID 5302 item: private row-1 code, meaning in Measured Property and modifiers."""
    mods = [
        code_item(code("measured_property"), code("peak_blood_velocity")),
        code_item(code("finding_site"), code(site)),
        code_item(code("image_mode"), CW),
    ]
    if phase is not None:
        mods.append(code_item(code("cardiac_phase"), code(phase)))
    if direction is not None:
        mods.append(code_item(code("flow_direction"), direction))
    return num_item(PRIVATE, value, "m/s", mods)


def _tid5200(site: str, direction: Code | None, *, phase: str | None = None, value=3.1):
    """A TID 5200 item: (20355-4, LN, Peak Blood Velocity) with its modifiers."""
    mods = [code_item(code("finding_site"), code(site))]
    if phase is not None:
        mods.append(code_item(code("cardiac_phase"), code(phase)))
    if direction is not None:
        mods.append(code_item(code("flow_direction"), direction))
    return num_item(code("peak_blood_velocity"), value, "m/s", mods)


def _measures(*items):
    doc = read_document(build_echo_sr((), raw_content=list(items)))
    return build_measurements([doc], TABLE)


@pytest.mark.parametrize("shape", [_tid5302, _tid5200], ids=["TID 5302", "TID 5200"])
@pytest.mark.parametrize("direction", [RETROGRADE, REGURGITANT], ids=["retrograde", "regurgitant"])
def test_backward_peak_velocity_at_the_tricuspid_valve_is_the_tr_velocity(shape, direction):
    m = _measures(shape("tricuspid_valve", direction))
    assert m.get(Measure.tr_peak_velocity) == 3.1
    assert not m.unrecognised


@pytest.mark.parametrize("shape", [_tid5302, _tid5200], ids=["TID 5302", "TID 5200"])
@pytest.mark.parametrize("direction", [ANTEGRADE, None], ids=["antegrade", "none"])
def test_forward_or_undirected_velocity_at_the_tricuspid_valve_is_not_tr(shape, direction):
    m = _measures(shape("tricuspid_valve", direction, value=0.6))
    assert Measure.tr_peak_velocity not in m.values
    assert len(m.unrecognised) == 1


@pytest.mark.parametrize("shape", [_tid5302, _tid5200], ids=["TID 5302", "TID 5200"])
@pytest.mark.parametrize(
    ("phase", "measure"),
    [("e_wave_phase", Measure.mitral_e), ("a_wave_phase", Measure.mitral_a)],
)
def test_mitral_regurgitation_is_never_the_e_or_a_wave(shape, phase, measure):
    for direction in (RETROGRADE, REGURGITANT):
        m = _measures(shape("mitral_valve", direction, phase=phase, value=5.0))
        assert measure not in m.values, direction
        assert len(m.unrecognised) == 1
    forward = _measures(shape("mitral_valve", ANTEGRADE, phase=phase, value=0.8))
    assert forward.get(measure) == 80.0  # cm/s, the canonical unit


@pytest.mark.parametrize("shape", [_tid5302, _tid5200], ids=["TID 5302", "TID 5200"])
@pytest.mark.parametrize(
    ("phase", "component"),
    [("s_wave_phase", Component.pv_s_velocity), ("d_wave_phase", Component.pv_d_velocity)],
)
def test_pulmonary_vein_atrial_reversal_is_never_the_s_or_d_wave(shape, phase, component):
    site = "pulmonary_vein" if shape is _tid5302 else "pulmonary_venous_structure"
    other = "d_wave_phase" if phase == "s_wave_phase" else "s_wave_phase"
    # a forward S and D give the S/D ratio; a backward item in their place does not
    fwd = _measures(
        shape(site, ANTEGRADE, phase=phase, value=0.4),
        shape(site, None, phase=other, value=0.5),
    )
    assert Measure.pv_s_d_ratio in fwd.values
    back = _measures(
        shape(site, RETROGRADE, phase=phase, value=0.4),
        shape(site, None, phase=other, value=0.5),
    )
    assert Measure.pv_s_d_ratio not in back.values
    assert any(u.path for u in back.unrecognised)


def test_tid5302_tr_velocity_changes_the_grade_as_the_pre_coordinated_code_does():
    # Nagueh 2016 Figure 8A: with 2 of 4 criteria abnormal the grade is indeterminate; the TR
    # velocity > 2.8 m/s is the third abnormal criterion (abnormal function)
    base = {
        Measure.mitral_e: 80.0,
        Measure.mitral_a: 60.0,
        Measure.e_prime_septal: 6.0,
        Measure.e_prime_lateral: 8.0,
        Measure.lavi: 40.0,
        Measure.lvef: 60.0,
    }
    items = [EchoItem(measure=k, value=v) for k, v in base.items()]
    pre = build_echo_sr([*items, EchoItem(measure=Measure.tr_peak_velocity, value=3.1)])
    post = build_echo_sr(items, raw_content=[_tid5302("tricuspid_valve", RETROGRADE)])
    graded = [grade_study([ds], GradeOptions()).assessment for ds in (pre, post)]
    assert graded[0].grade == graded[1].grade
    assert graded[0].criteria == graded[1].criteria
