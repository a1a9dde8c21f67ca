"""What the node records about a study for the audit, built from the real pipeline's outcome on
the invented demo studies (fictional Harbour Vale Cardiac Centre)."""

from __future__ import annotations

import pytest

from service.audit.facts import Device, device_of, study_facts
from service.commands.grade import outcome_row
from service.demo.scenario import CASES, SITE_MAPPING, case_datasets
from service.model import Context, Guideline, Measure, Outcome, Pathway, SpecialSituation
from service.pipeline import GradeOptions, grade_study
from service.sr.echo_builder import EchoItem, Equipment, build_echo_sr
from service.vocabulary.mapper import load_mapping_table

TABLE = load_mapping_table([SITE_MAPPING])
CASE = {c.key: c for c in CASES}


def _facts(key: str, options: GradeOptions | None = None, **kw):
    options = options or GradeOptions()
    datasets = case_datasets(CASE[key])
    outcome = grade_study(datasets, options, table=TABLE)
    return outcome, study_facts(outcome, datasets, options, **kw)


@pytest.mark.parametrize("case", [c.key for c in CASES])
def test_outcome_pathway_and_measures_are_those_of_the_grade(case):
    outcome, facts = _facts(case)
    a = outcome.assessment
    assert facts.outcome is a.outcome
    assert facts.pathway is a.pathway
    assert facts.guideline is Guideline.ase_eacvi_2016
    # the canonical names of the grade JSON's "measurements"
    row = outcome_row(CASE[case].key, GradeOptions(), outcome, None)
    assert {m.value for m in facts.measures} == set(row["measurements"])


def test_borderline_cut_off_with_its_measure_and_words():
    # the demo's borderline case: average E/e′ 13.6 against > 14 (Nagueh 2016, Figure 8B)
    _, facts = _facts("borderline")
    assert [(c.measure, c.comparison.value, c.threshold, c.label) for c in facts.borderline] == [
        (Measure.e_e_prime_average, ">", 14.0, "Average E/e′ > 14")
    ]


def test_atrial_fibrillation_is_an_outcome_of_its_own_without_missing_measures():
    _, facts = _facts("atrial-fibrillation")
    assert facts.outcome is Outcome.atrial_fibrillation
    assert facts.pathway is Pathway.atrial_fibrillation
    assert facts.missing == ()


def test_the_not_gradable_study_names_the_missing_measures():
    _, facts = _facts("not-gradable")
    assert facts.outcome is Outcome.not_gradable
    assert {e.measure for e in facts.missing} == {
        Measure.e_prime_septal,
        Measure.e_prime_lateral,
        Measure.tr_peak_velocity,
        Measure.lavi,
    }


@pytest.mark.parametrize("case", [c.key for c in CASES])
def test_guideline_comparison_matches_the_result_s_own_comparison(case):
    """Without --compare the facts compare the guidelines themselves; with it they take the
    result's comparison; both say the same."""
    _, plain = _facts(case)
    outcome, compared = _facts(case, GradeOptions(compare=True))
    assert plain.compared == compared.compared == (Guideline.ase_eacvi_2016, Guideline.ase_2025)
    assert plain.disagreement == compared.disagreement == bool(outcome.assessments.disagreements)
    # what the other guideline concluded, where it differed
    other = outcome.assessments.others[0]
    expected = {Guideline.ase_2025: other.outcome} if plain.disagreement else {}
    assert plain.other_outcomes == compared.other_outcomes == expected


def test_special_situation_outcome():
    options = GradeOptions(
        context=Context(special_situations=frozenset({SpecialSituation.heart_transplant}))
    )
    _, facts = _facts("normal", options)
    assert facts.outcome is Outcome.special_situation


def test_no_patient_identity_unless_asked():
    _, facts = _facts("normal", calling_ae="HV_ECHO_1")
    assert (facts.patient_name, facts.patient_id) == ("", "")
    assert "Marlowe" not in facts.model_dump_json()
    _, named = _facts("normal", calling_ae="HV_ECHO_1", patient_identity=True)
    assert (named.patient_name, named.patient_id) == ("Marlowe^Tessa", "HV100201")


def test_device_from_the_association_and_the_source_header():
    """Station Name (0008,1010), Manufacturer (0008,0070), Manufacturer's Model Name
    (0008,1090), PS3.3 C.7.5.1 General Equipment Module; keyed by the calling AE title, else
    Station Name, else manufacturer and model."""
    ds = build_echo_sr(
        [EchoItem(measure=Measure.mitral_e, value=80)],
        equipment=Equipment(manufacturer="Harbour Vale", model="HV-Echo 9", station_name="ECHO7"),
    )
    assert ds["StationName"].tag == 0x00081010
    dev = device_of([ds], "HV_ECHO_7 ")
    assert dev == Device(
        calling_ae="HV_ECHO_7", station_name="ECHO7", manufacturer="Harbour Vale", model="HV-Echo 9"
    )
    assert dev.key == "HV_ECHO_7"
    assert device_of([ds]).key == "ECHO7"
    del ds.StationName
    assert device_of([ds]).key == "Harbour Vale HV-Echo 9"
