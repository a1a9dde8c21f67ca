"""Code -> canonical measure: encodings, units, plausibility, repeats, derivations, documents.

Code meanings: DICOM PS3.16 (CID 12300, TID 5200/5302) as bundled in pydicom, see
test_standard_codes.py.  Policies without a published source are marked common practice."""

from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.model import Code, Measure, Origin
from service.sr.echo_builder import (
    EchoItem,
    Encoding,
    Selection,
    SopClass,
    Study,
    Template,
    build_echo_sr,
    code_item,
    container,
    num_item,
)
from service.sr.read import read_document
from service.vocabulary.mapper import build_measurements, load_mapping_table, round2
from service.vocabulary.measures import Component
from service.vocabulary.standard import code

EXAMPLE = Path(__file__).resolve().parents[1] / "config" / "mappings" / "example-site.toml"
TABLE = load_mapping_table([EXAMPLE])
M = Measure
E_ONLY = [EchoItem(measure=Measure.mitral_e, value=80)]


def run(items, template=Template.tid5300, **kw):
    doc = read_document(build_echo_sr(items, template=template, **kw))
    return doc, build_measurements([doc], TABLE)


def accounted(docs, m):
    """Every NUM is used, excluded or unrecognised; excluded/unrecognised exactly once."""
    all_nums = {(o.source_uid, o.path) for d in docs for o in d.observations}
    # paths[i] lies in source_uids[i]; an age from the patient module has no path
    used = {
        (u, p)
        for v in m.values.values()
        if v.paths
        for u, p in zip(v.source_uids, v.paths, strict=True)
    }
    excluded = [(e.source_uid, e.path) for e in m.excluded]
    unrec = [(u.source_uid, u.path) for u in m.unrecognised]
    assert len(excluded) == len(set(excluded))
    assert len(unrec) == len(set(unrec))
    assert not (used & set(excluded))
    assert not (used & set(unrec))
    assert not (set(excluded) & set(unrec))
    assert used | set(excluded) | set(unrec) == all_nums


# --- encodings ---------------------------------------------------------------------------------


def test_pre_coordinated_cid_12300_codes():
    items = [
        EchoItem(measure=M.mitral_e, value=0.82, unit="m/s"),
        EchoItem(measure=M.mitral_a, value=61),
        EchoItem(measure=M.e_a_ratio, value=1.34),
        EchoItem(measure=M.deceleration_time, value=0.21, unit="s"),
        EchoItem(measure=M.e_prime_septal, value=6),
        EchoItem(measure=M.e_prime_lateral, value=9),
        EchoItem(measure=M.tr_peak_velocity, value=290, unit="cm/s"),
        EchoItem(measure=M.lavi, value=38, unit="ml/m2"),
        EchoItem(measure=M.lvef, value=58),
        EchoItem(measure=M.ivrt, value=90),
    ]
    doc, m = run(items)
    assert m.get(M.mitral_e) == 82.0
    assert m.get(M.mitral_a) == 61
    assert m.get(M.e_a_ratio) == 1.34  # reported, consistent with 82/61 = 1.344
    assert m.values[M.e_a_ratio].origin is Origin.measured
    assert m.get(M.deceleration_time) == 210.0
    assert m.get(M.tr_peak_velocity) == 2.9
    assert m.get(M.lavi) == 38
    assert m.get(M.lvef) == 58
    assert m.get(M.ivrt) == 90
    assert m.values[M.mitral_e].codes == ("80070-6 LN",)
    accounted([doc], m)


def test_tid5200_sections_with_inherited_and_overriding_sites():
    items = [
        EchoItem(measure=M.mitral_e, value=90, encoding=Encoding.tid5200),
        EchoItem(measure=M.mitral_a, value=70, encoding=Encoding.generic),  # 59081-0 + MV section
        EchoItem(measure=M.deceleration_time, value=180, encoding=Encoding.generic),
        # 399133000 in the LV section with its own Finding Site (annulus) overriding LV
        EchoItem(measure=M.e_prime_septal, value=5, encoding=Encoding.tid5200),
        EchoItem(measure=M.e_prime_lateral, value=8, encoding=Encoding.tid5200),
        EchoItem(measure=M.tr_peak_velocity, value=-3.1, unit="m/s", encoding=Encoding.tid5200),
        EchoItem(measure=M.lavi, value=40, encoding=Encoding.tid5200),
        EchoItem(measure=M.lvef, value=55, encoding=Encoding.tid5200),
    ]
    doc, m = run(items, template=Template.tid5200)
    assert doc.template == "5200"
    assert m.get(M.mitral_e) == 90
    assert m.get(M.mitral_a) == 70
    assert m.get(M.deceleration_time) == 180
    assert m.get(M.e_prime_septal) == 5
    assert m.get(M.e_prime_lateral) == 8
    # TR velocity sign is the jet direction; magnitude used (common practice)
    assert m.get(M.tr_peak_velocity) == 3.1
    assert m.get(M.lavi) == 40
    assert m.get(M.lvef) == 55
    accounted([doc], m)


def test_generic_e_wave_by_tdi_at_the_mitral_valve_is_not_mitral_e():
    e_tdi = num_item(code("e_wave_peak"), 9, "cm/s", [code_item(code("image_mode"), code("tdi"))])
    section = container(
        Code(value="121070", scheme="DCM", meaning="Findings"),
        [code_item(code("finding_site"), code("mitral_valve")), e_tdi],
    )
    doc, m = run([], raw_content=[section])
    assert M.mitral_e not in m.values
    assert len(m.unrecognised) == 1
    accounted([doc], m)


def test_tid5302_post_coordinated_with_measured_property():
    items = [
        EchoItem(measure=M.mitral_e, value=100, encoding=Encoding.post),
        EchoItem(measure=M.mitral_a, value=50, encoding=Encoding.post),
        EchoItem(measure=M.e_prime_septal, value=7, encoding=Encoding.post),
        EchoItem(measure=M.e_prime_lateral, value=11, encoding=Encoding.post),
        EchoItem(measure=M.tr_peak_velocity, value=2.5, encoding=Encoding.post),
        EchoItem(measure=M.deceleration_time, value=150, encoding=Encoding.post),
        EchoItem(measure=M.la_reservoir_strain, value=22, encoding=Encoding.post),
    ]
    doc, m = run(items, sop_class=SopClass.simplified_echo)
    assert doc.template == "5300"
    assert [m.get(x) for x in (M.mitral_e, M.mitral_a, M.e_prime_septal, M.e_prime_lateral)] == [
        100,
        50,
        7,
        11,
    ]
    assert m.get(M.tr_peak_velocity) == 2.5
    assert m.get(M.deceleration_time) == 150
    assert m.get(M.la_reservoir_strain) == 22
    accounted([doc], m)


def test_peak_tissue_velocity_in_late_diastole_is_not_e_prime():
    a_prime = num_item(
        Code(value="X1", scheme="99HVCC", meaning="a prime"),
        5,
        "cm/s",
        [
            code_item(code("measured_property"), code("peak_tissue_velocity")),
            code_item(code("finding_site"), code("medial_annulus")),
            code_item(code("cardiac_phase"), code("a_wave_phase")),
        ],
    )
    _, m = run([], raw_content=[a_prime])
    assert M.e_prime_septal not in m.values
    assert len(m.unrecognised) == 1


def test_tr_velocity_needs_regurgitant_flow():
    forward = num_item(
        code("peak_blood_velocity"),
        0.6,
        "m/s",
        [code_item(code("finding_site"), code("tricuspid_valve"))],
    )
    _, m = run([], raw_content=[forward])
    assert M.tr_peak_velocity not in m.values
    assert len(m.unrecognised) == 1


def test_legacy_srt_codes_are_normalised():
    e = num_item(code("e_wave_peak"), 85, "cm/s")
    section = container(
        Code(value="121070", scheme="DCM", meaning="Findings"),
        [
            code_item(
                Code(value="G-C0E3", scheme="SRT", meaning="Finding Site"),
                Code(value="T-35300", scheme="SRT", meaning="Mitral Valve"),
            ),
            e,
        ],
    )
    _, m = run([], raw_content=[section])
    assert m.get(M.mitral_e) == 85


def test_private_site_codes():
    items = [
        EchoItem(measure=M.e_prime_average, value=7.5, encoding=Encoding.private),
        EchoItem(measure=M.pasp, value=4, unit="kPa", encoding=Encoding.private),
    ]
    doc, m = run(items)
    assert m.get(M.e_prime_average) == 7.5
    assert m.get(M.pasp) == pytest.approx(30.0, abs=0.01)  # 4 kPa x 7.50062
    accounted([doc], m)


# --- units and plausibility ---------------------------------------------------------------------


@pytest.mark.parametrize(
    ("item", "reason"),
    [
        (EchoItem(measure=M.mitral_e, value=30, unit="m/s"), "implausible value 3000"),
        (EchoItem(measure=M.mitral_e, value=-80), "implausible value -80"),
        (EchoItem(measure=M.mitral_e, value=80, unit=None), "no unit"),
        (EchoItem(measure=M.mitral_e, value=80, unit="knots"), "unknown unit 'knots'"),
        (EchoItem(measure=M.mitral_e, value=80, unit="ms"), "is a time unit"),
        (EchoItem(measure=M.lvef, value=0.6, unit="1"), "unit '1'"),
        (
            EchoItem(
                measure=M.mitral_e,
                value=None,
                qualifier=Code(value="114007", scheme="DCM", meaning="Measurement not attempted"),
            ),
            "qualifier",
        ),
    ],
)
def test_unusable_values_are_excluded_with_a_reason(item, reason):
    doc, m = run([item])
    assert item.measure not in m.values
    assert len(m.excluded) == 1
    assert reason in m.excluded[0].reason
    assert m.excluded[0].measure is item.measure
    accounted([doc], m)


def test_la_volume_in_ml_is_not_lavi():
    _, m = run(
        [EchoItem(measure=M.lavi, value=60, unit="mL", encoding=Encoding.tid5200)],
        template=Template.tid5200,
    )
    assert M.lavi not in m.values
    assert "volume" in m.excluded[0].reason


def test_non_ucum_alias_is_noted():
    _, m = run([EchoItem(measure=M.mitral_e, value=80, unit="cm/sec")])
    assert m.get(M.mitral_e) == 80
    assert any("cm/sec" in n for n in m.notes)


# --- repeats ----------------------------------------------------------------------------------


def test_unmarked_repeats_are_averaged():
    items = [EchoItem(measure=M.mitral_e, value=v) for v in (80, 82, 85)]
    doc, m = run(items)
    v = m.values[M.mitral_e]
    assert v.value == 82.33 and v.origin is Origin.mean_of_repeats and v.n == 3
    assert v.detail == "mean of 3 unmarked repeats"
    accounted([doc], m)


@pytest.mark.parametrize("selection", list(Selection))
def test_selection_status_is_honoured(selection):
    items = [
        EchoItem(measure=M.mitral_e, value=80),
        EchoItem(measure=M.mitral_e, value=90, selection=selection),
        EchoItem(measure=M.mitral_e, value=85),
    ]
    doc, m = run(items)
    assert m.get(M.mitral_e) == 90
    assert m.values[M.mitral_e].origin is Origin.selected
    assert len(m.excluded) == 2
    accounted([doc], m)


def test_device_mean_is_used():
    items = [
        EchoItem(measure=M.e_prime_septal, value=6, encoding=Encoding.tid5200),
        EchoItem(measure=M.e_prime_septal, value=7, encoding=Encoding.tid5200),
        EchoItem(
            measure=M.e_prime_septal, value=6.4, encoding=Encoding.tid5200, derivation_mean=True
        ),
    ]
    doc, m = run(items, template=Template.tid5200)
    assert m.get(M.e_prime_septal) == 6.4
    assert m.values[M.e_prime_septal].origin is Origin.device_mean
    accounted([doc], m)


def test_different_sites_are_different_measures():
    items = [
        EchoItem(measure=M.e_prime_septal, value=6),
        EchoItem(measure=M.e_prime_lateral, value=10),
    ]
    _, m = run(items)
    assert m.get(M.e_prime_septal) == 6 and m.get(M.e_prime_lateral) == 10


def test_preferred_encoding_of_lvef():
    items = [
        EchoItem(measure=M.lvef, value=50, concept=code("lvef_4c")),
        EchoItem(measure=M.lvef, value=60),  # biplane MOD, preferred (common practice)
    ]
    doc, m = run(items)
    assert m.get(M.lvef) == 60
    assert "another encoding" in m.excluded[0].reason
    accounted([doc], m)


def test_lvef_by_us_prefers_biplane_method_of_disks():
    teichholz = Code(value="125209", scheme="DCM", meaning="Teichholz")
    items = [
        EchoItem(
            measure=M.lvef,
            value=66,
            encoding=Encoding.tid5200,
            extra_modifiers=((code("measurement_method"), teichholz),),
        ),
        EchoItem(measure=M.lvef, value=57, encoding=Encoding.tid5200),  # biplane MOD
    ]
    # the builder adds its biplane method too; the Teichholz item's own method comes first
    doc, m = run(items, template=Template.tid5200)
    assert m.get(M.lvef) == 57
    accounted([doc], m)


def test_tid5200_deceleration_time_and_reported_pv_s_d():
    items = [
        EchoItem(measure=M.deceleration_time, value=0.19, unit="s", encoding=Encoding.tid5200),
        EchoItem(measure=M.pv_s_d_ratio, value=1.3, encoding=Encoding.tid5200),
        EchoItem(measure=Component.pv_s_velocity, value=52, encoding=Encoding.tid5200),
        EchoItem(measure=Component.pv_d_velocity, value=40, encoding=Encoding.tid5200),
    ]
    doc, m = run(items, template=Template.tid5200)
    assert m.get(M.deceleration_time) == 190
    assert m.values[M.deceleration_time].codes == ("399354002 SCT",)
    assert m.get(M.pv_s_d_ratio) == 1.3  # reported 1.3 agrees with 52 / 40 = 1.3
    assert m.values[M.pv_s_d_ratio].origin is Origin.measured
    accounted([doc], m)


def test_pulmonary_vein_great_vessel_code_in_tid5302():
    # TID 5302 uses (430757002, SCT, "Pulmonary Vein"); TID 5200 sections 122972007
    items = [
        EchoItem(measure=Component.pv_s_velocity, value=40, encoding=Encoding.post),
        EchoItem(measure=Component.pv_d_velocity, value=50, encoding=Encoding.post),
    ]
    doc, m = run(items)
    assert m.get(M.pv_s_d_ratio) == 0.8
    assert m.values[M.pv_s_d_ratio].origin is Origin.derived
    accounted([doc], m)


# --- Valsalva ---------------------------------------------------------------------------------


def test_valsalva_values_never_become_resting_values():
    items = [
        EchoItem(measure=M.mitral_e, value=90, encoding=Encoding.tid5200),
        EchoItem(measure=M.mitral_a, value=60, encoding=Encoding.tid5200),
        EchoItem(measure=M.mitral_e, value=60, encoding=Encoding.tid5200, stage_valsalva=True),
        EchoItem(measure=M.mitral_a, value=75, encoding=Encoding.tid5200, stage_valsalva=True),
        EchoItem(measure=M.e_prime_septal, value=6, encoding=Encoding.tid5200, stage_valsalva=True),
    ]
    doc, m = run(items, template=Template.tid5200)
    assert m.get(M.mitral_e) == 90 and m.get(M.mitral_a) == 60
    assert m.get(M.mitral_e_valsalva) == 60 and m.get(M.mitral_a_valsalva) == 75
    assert m.get(M.e_a_ratio) == 1.5
    assert m.get(M.e_a_ratio_valsalva) == 0.8
    assert M.e_prime_septal not in m.values
    assert "Valsalva" in m.excluded[0].reason
    accounted([doc], m)


def test_pre_coordinated_valsalva_stage():
    items = [EchoItem(measure=M.e_a_ratio, value=0.9, stage_valsalva=True)]
    _, m = run(items)
    assert M.e_a_ratio not in m.values and m.get(M.e_a_ratio_valsalva) == 0.9


# --- derivations ------------------------------------------------------------------------------


def test_boundary_average_e_e_prime_is_exactly_14():
    # average E/e' is E over the average e' (Nagueh 2016 JASE 29:277), not a mean of site ratios
    items = [
        EchoItem(measure=M.mitral_e, value=119),
        EchoItem(measure=M.e_prime_septal, value=7),
        EchoItem(measure=M.e_prime_lateral, value=10),
    ]
    _, m = run(items)
    assert m.get(M.e_prime_average) == 8.5
    assert m.get(M.e_e_prime_average) == 14.0
    assert m.get(M.e_e_prime_septal) == 17.0
    assert m.get(M.e_e_prime_lateral) == 11.9
    v = m.values[M.e_e_prime_average]
    assert v.origin is Origin.derived
    assert set(v.codes) == {"80070-6 LN", "79911-4 LN", "80054-0 LN"}
    # the mean of the site ratios would be (17.0 + 11.9) / 2 = 14.45: not used
    assert m.get(M.e_e_prime_average) != 14.45


def test_rounding_is_half_up_to_two_decimals():
    assert round2(2.345) == 2.35
    assert round2(13.8333333) == 13.83
    assert round2(0.125) == 0.13


def test_reported_ratio_far_from_components_is_replaced_and_noted():
    items = [
        EchoItem(measure=M.mitral_e, value=80),
        EchoItem(measure=M.mitral_a, value=40),
        EchoItem(measure=M.e_a_ratio, value=1.5),  # components give 2.0: > 10 % apart
    ]
    doc, m = run(items)
    assert m.get(M.e_a_ratio) == 2.0
    assert m.values[M.e_a_ratio].origin is Origin.derived
    assert any("1.5" in n and "2" in n and "10%" in n for n in m.notes)
    assert any("disagrees" in e.reason for e in m.excluded)
    accounted([doc], m)


def test_reported_ratio_within_ten_percent_is_kept():
    items = [
        EchoItem(measure=M.mitral_e, value=80),
        EchoItem(measure=M.mitral_a, value=40),
        EchoItem(measure=M.e_a_ratio, value=1.85),  # 7.5 % below 2.0
    ]
    _, m = run(items)
    assert m.get(M.e_a_ratio) == 1.85 and m.values[M.e_a_ratio].origin is Origin.measured


def test_reported_site_ratio_disagreeing_with_components():
    items = [
        EchoItem(measure=M.mitral_e, value=100, encoding=Encoding.tid5200),
        EchoItem(measure=M.e_prime_septal, value=5, encoding=Encoding.tid5200),
        EchoItem(measure=M.e_e_prime_septal, value=15, encoding=Encoding.tid5200),  # vs 20
    ]
    _, m = run(items, template=Template.tid5200)
    assert m.get(M.e_e_prime_septal) == 20.0


def test_pv_s_d_from_components_and_lone_component_accounted():
    items = [
        EchoItem(measure=Component.pv_s_velocity, value=45, encoding=Encoding.tid5200),
        EchoItem(measure=Component.pv_d_velocity, value=60, encoding=Encoding.tid5200),
    ]
    doc, m = run(items, template=Template.tid5200)
    assert m.get(M.pv_s_d_ratio) == 0.75
    accounted([doc], m)
    doc, m = run([EchoItem(measure=Component.pv_s_velocity, value=45)])
    assert M.pv_s_d_ratio not in m.values
    assert "D velocity" in m.excluded[0].reason
    accounted([doc], m)


def test_ar_minus_a_duration():
    items = [
        EchoItem(measure=Component.pv_ar_duration, value=150),
        EchoItem(measure=Component.mitral_a_duration, value=120),
    ]
    _, m = run(items)
    assert m.get(M.ar_a_duration) == 30


# --- documents, age, unrecognised -------------------------------------------------------------


def test_more_recent_sr_wins():
    old = read_document(
        build_echo_sr(
            [EchoItem(measure=M.mitral_e, value=70), EchoItem(measure=M.lvef, value=60)],
            study=Study(seed="s", content_date="20260301", content_time="090000"),
            instance_number=1,
        )
    )
    new = read_document(
        build_echo_sr(
            [EchoItem(measure=M.mitral_e, value=95)],
            study=Study(seed="s", content_date="20260301", content_time="100000"),
            instance_number=2,
        )
    )
    for docs in ([old, new], [new, old]):
        m = build_measurements(docs, TABLE)
        assert m.get(M.mitral_e) == 95
        assert m.values[M.mitral_e].source_uids == (new.sop_instance_uid,)
        assert m.get(M.lvef) == 60  # only in the older SR
        assert "superseded" in m.excluded[0].reason
        accounted(docs, m)


def test_age_from_the_patient_module():
    _, m = run([EchoItem(measure=M.mitral_e, value=80)])
    v = m.values[M.age]
    assert v.value == 66 and v.origin is Origin.patient and v.unit == "a"


def test_subject_age_num_agrees_with_or_yields_to_the_patient_module():
    from service.sr.echo_builder import Patient

    agreeing = num_item(code("subject_age"), 66, "a")
    doc, m = run(E_ONLY, raw_content=[agreeing])
    assert m.values[M.age].origin is Origin.patient and m.get(M.age) == 66
    assert m.values[M.age].paths == (doc.observations[-1].path,)
    accounted([doc], m)
    disagreeing = num_item(code("subject_age"), 50, "a")
    doc, m = run(E_ONLY, raw_content=[disagreeing])
    assert m.get(M.age) == 66 and "differs" in m.excluded[0].reason
    accounted([doc], m)
    # no Patient's Age: the reader takes Subject Age (18 months = 1.5 years)
    months = num_item(code("subject_age"), 18, "mo")
    doc, m = run(E_ONLY, raw_content=[months], patient=Patient(age=None, birth_date=""))
    assert m.get(M.age) == 1.5 and m.values[M.age].origin is Origin.patient
    accounted([doc], m)


def test_unrecognised_items_keep_their_modifiers():
    odd = num_item(
        Code(value="ZZ1", scheme="99OTHER", meaning="Something"),
        3,
        "cm",
        [code_item(code("finding_site"), code("left_atrium"))],
    )
    _, m = run([], raw_content=[odd])
    (u,) = m.unrecognised
    assert u.concept.value == "ZZ1" and u.value == 3 and u.unit == "cm"
    assert u.modifiers[0].value == code("left_atrium")


# --- property: any mix is accounted for, never an exception ------------------------------------


def _pairs(flat_only: bool) -> list[tuple[object, Encoding]]:
    from service.sr.echo_builder import GENERIC_5200, POST_5302, PRE, PRIVATE_CODES, SECTION_5200

    pairs = [(q, Encoding.pre) for q in PRE]
    pairs += [(q, Encoding.post) for q in POST_5302]
    pairs += [(q, Encoding.private) for q in PRIVATE_CODES]
    if not flat_only:
        pairs += [(q, Encoding.tid5200) for q in SECTION_5200]
        pairs += [(q, Encoding.generic) for q in GENERIC_5200]
    return pairs


def _items(flat_only: bool):
    return st.builds(
        lambda pair, **kw: EchoItem(measure=pair[0], encoding=pair[1], **kw),
        st.sampled_from(_pairs(flat_only)),
        value=st.one_of(
            st.none(),
            st.floats(min_value=-500, max_value=5000, allow_nan=False, allow_infinity=False),
        ),
        unit=st.sampled_from(
            ["canonical", None, "m/s", "cm/s", "ms", "s", "%", "1", "mL/m2", "mL", "mmHg", "xyz"]
        ),
        selection=st.one_of(st.none(), st.sampled_from(list(Selection))),
        derivation_mean=st.booleans(),
        stage_valsalva=st.booleans(),
        float_value=st.booleans(),
    )


@settings(
    max_examples=60, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow]
)
@given(st.lists(_items(False), min_size=1, max_size=14), st.lists(_items(True), max_size=5))
def test_any_mix_yields_measurements_and_accounts_for_every_num(items_a, items_b):
    first = build_echo_sr(
        items_a, template=Template.tid5200, study=Study(seed="a", content_time="090000")
    )
    docs = [read_document(first)]
    if items_b:
        docs.append(
            read_document(
                build_echo_sr(
                    items_b, study=Study(seed="b", content_time="100000"), instance_number=2
                )
            )
        )
    m = build_measurements(docs, TABLE)
    accounted(docs, m)
    for v in m.values.values():
        assert v.value == v.value  # not NaN
