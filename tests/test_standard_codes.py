"""Every standard code used by the mapping tables against pydicom 3.0.2's bundled dictionary
(``pydicom.sr._concepts_dict.concepts``, generated from DICOM PS3.16)."""

from pydicom.sr import _concepts_dict

from service.model import Measure
from service.vocabulary.measures import parse_quantity
from service.vocabulary.rules import MODIFIER_NAMES
from service.vocabulary.srt import SRT_TO_SCT, normalise
from service.vocabulary.standard import CODES, STANDARD_RULES


def _pydicom_index() -> dict[tuple[str, str], list[tuple[str, list[int]]]]:
    index: dict[tuple[str, str], list[tuple[str, list[int]]]] = {}
    for scheme, by_keyword in _concepts_dict.concepts.items():
        for entries in by_keyword.values():
            for value, (meaning, cids) in entries.items():
                index.setdefault((scheme, value), []).append((meaning, list(cids)))
    return index


PYD = _pydicom_index()


def test_every_verified_code_exists_with_its_meaning_and_cids():
    # source: DICOM PS3.16 via pydicom.sr._concepts_dict
    checked = 0
    for name, known in CODES.items():
        if known.from_memory:
            continue
        key = (known.code.scheme, known.code.value)
        assert key in PYD, f"{name}: {key} not in pydicom's PS3.16 dictionary"
        meanings = {m for m, _ in PYD[key]}
        assert known.code.meaning in meanings, f"{name}: meaning {known.code.meaning!r}"
        cids = {c for _, cs in PYD[key] for c in cs}
        for cid in known.cids:
            assert cid in cids, f"{name}: {key} not listed in CID {cid} by pydicom"
        checked += 1
    assert checked >= 80


def test_cid_12300_codes_are_listed_in_pydicom_cid_dictionary():
    # source: DICOM PS3.16 CID 12300 via pydicom.sr._cid_dict
    from pydicom.sr import _cid_dict

    assert _cid_dict.name_for_cid[12300] == "CoreEchoMeasurement"
    cid_codes = {
        (scheme, value)
        for scheme, keywords in _cid_dict.cid_concepts[12300].items()
        for kw in keywords
        for value in _concepts_dict.concepts[scheme][kw]
    }
    claimed = [k for k in CODES.values() if 12300 in k.cids]
    assert len(claimed) >= 19
    for known in claimed:
        assert (known.code.scheme, known.code.value) in cid_codes


def test_codes_marked_from_memory_are_really_absent_from_pydicom():
    # a code pydicom has must be verified, not marked from memory
    memory = [k for k in CODES.values() if k.from_memory]
    assert memory, "Stage (18139-6, LN) is expected to be marked from memory"
    for known in memory:
        assert (known.code.scheme, known.code.value) not in PYD


def test_rules_only_use_declared_codes_and_known_quantities():
    declared = {k.code for k in CODES.values()}
    for rule in STANDARD_RULES:
        if rule.concept is not None:
            assert rule.concept in declared, rule.id
        for cond in rule.conditions:
            for c in (*cond.names, *cond.values):
                assert c in declared, (rule.id, c)
        parse_quantity(rule.quantity)
    for names in MODIFIER_NAMES.values():
        assert names[0] in declared


def test_every_grading_input_has_a_standard_encoding_or_a_derivation():
    mapped = {parse_quantity(r.quantity) for r in STANDARD_RULES}
    derived = {Measure.e_prime_average, Measure.e_e_prime_average, Measure.ar_a_duration}
    for m in (
        Measure.mitral_e,
        Measure.mitral_a,
        Measure.e_a_ratio,
        Measure.deceleration_time,
        Measure.e_prime_septal,
        Measure.e_prime_lateral,
        Measure.tr_peak_velocity,
        Measure.lavi,
        Measure.lvef,
    ):
        assert m in mapped
    from service.vocabulary.mapper import DERIVATIONS

    assert derived <= {d.target for d in DERIVATIONS}


def test_srt_codes_normalise_to_sct():
    # source: PS3.16 SNOMED mapping via pydicom.sr._snomed_dict (T-35300 = Mitral valve)
    assert normalise("SRT", "T-35300") == ("SCT", "91134007")
    assert normalise("SRT", "G-C0E3") == ("SCT", "363698007")
    assert normalise("LN", "80070-6") == ("LN", "80070-6")
    assert len(SRT_TO_SCT) > 1000
