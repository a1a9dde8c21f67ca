"""Site mapping TOML files: loading, matching and clear errors."""

from pathlib import Path

import pytest

from service.errors import UserError
from service.model import Code, Measure, Modifier, Observation
from service.vocabulary.mapper import build_measurements, load_mapping_table
from service.vocabulary.site import load_site_file

EXAMPLE = Path(__file__).resolve().parents[1] / "config" / "mappings" / "example-site.toml"


def _obs(code: str, scheme: str, value: float, unit: str, *mods: tuple[str, str, str, str]):
    return Observation(
        path="1.1.1",
        concept=Code(value=code, scheme=scheme),
        value=value,
        unit=Code(value=unit, scheme="UCUM"),
        modifiers=tuple(
            Modifier(name=Code(value=a, scheme=b), value=Code(value=c, scheme=d))
            for a, b, c, d in mods
        ),
        source_uid="1.2.3",
    )


def _doc(*obs):
    from service.model import SourceDocument

    return SourceDocument(
        sop_instance_uid="1.2.3",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        study_instance_uid="1.2",
        series_instance_uid="1.2.1",
        observations=obs,
    )


def test_example_file_loads_and_lists_its_rules_with_sources():
    rules = load_site_file(EXAMPLE)
    assert len(rules) >= 10
    table = load_mapping_table([EXAMPLE])
    site_entries = [e for e in table.entries if e.origin == "site"]
    assert len(site_entries) == len(rules)
    assert all("example-site.toml" in e.source for e in site_entries)
    assert all(r.concept is None or r.concept.scheme.startswith("99") for r in rules)


def test_private_code_maps_through_the_site_table():
    table = load_mapping_table([EXAMPLE])
    m = build_measurements([_doc(_obs("HV-LAVI", "99HVCC", 41, "mL/m2"))], table)
    assert m.get(Measure.lavi) == 41
    # without the site table the same code is unrecognised, never silently dropped
    m2 = build_measurements([_doc(_obs("HV-LAVI", "99HVCC", 41, "mL/m2"))], load_mapping_table())
    assert Measure.lavi not in m2.values
    assert [u.concept.value for u in m2.unrecognised] == ["HV-LAVI"]


def test_modifier_conditions_select_the_measure():
    table = load_mapping_table([EXAMPLE])
    site = ("363698007", "SCT")
    mode = ("399264008", "SCT")
    e = _obs(
        "HV-PKV", "99HVCC", 80, "cm/s", (*site, "91134007", "SCT"), (*mode, "261199008", "SCT")
    )
    sep = _obs(
        "HV-PKV", "99HVCC", 6, "cm/s", (*site, "399093001", "SCT"), (*mode, "439858009", "SCT")
    )
    tdi_at_mv = _obs(
        "HV-PKV", "99HVCC", 6, "cm/s", (*site, "91134007", "SCT"), (*mode, "439858009", "SCT")
    )
    assert table.match(e).quantity == "mitral_e"
    assert table.match(sep).quantity == "e_prime_septal"
    assert table.match(tdi_at_mv) is None  # where_not image_mode TDI


def test_site_rule_overrides_a_standard_rule(tmp_path):
    f = tmp_path / "override.toml"
    f.write_text('[[rule]]\ncode = "80070-6"\nscheme = "LN"\nmeasure = "mitral_a"\n')
    table = load_mapping_table([f])
    assert table.match(_obs("80070-6", "LN", 80, "cm/s")).quantity == "mitral_a"
    assert table.digest != load_mapping_table().digest


def test_digest_is_stable():
    assert load_mapping_table([EXAMPLE]).digest == load_mapping_table([EXAMPLE]).digest
    assert len(load_mapping_table().digest) == 64


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("[[rule]\ncode=1", "not valid TOML"),
        (
            '[[rule]]\ncode = "X"\nscheme = "99A"\nmeasure = "mitral_q"\n',
            r"rule\[0\]\.measure = 'mitral_q'.*mitral_e",
        ),
        ('[[rule]]\ncode = "X"\nscheme = "99A"\n', r"rule\[0\]\.measure"),
        (
            '[[rule]]\ncode = "X"\nscheme = "99A"\nmeasure = "mitral_e"\n'
            '[rule.where]\nsite = ["1 SCT"]\n',
            r"rule\[0\]\.where\.site = 'site'.*finding_site",
        ),
        (
            '[[rule]]\ncode = "X"\nscheme = "99A"\nmeasure = "mitral_e"\n'
            '[rule.where]\nfinding_site = ["91134007"]\n',
            r"rule\[0\]\.where\.finding_site\[0\] = '91134007'.*CODEVALUE SCHEME",
        ),
        (
            '[[rule]]\ncode = "*"\nscheme = "99A"\nmeasure = "mitral_e"\n',
            "only together with a where",
        ),
        (
            '[[rule]]\ncode = "X"\nscheme = "99A"\nmeasure = "lavi"\nunit = "ml"\n',
            r"rule\[0\]\.unit",
        ),
        ('[[rule]]\ncode = "X"\nscheme = "9 9"\nmeasure = "lavi"\n', r"rule\[0\]\.scheme"),
        ('[[rule]]\ncode = "X"\nscheme = "99A"\nmeasure = "lavi"\npriority = -1\n', "priority"),
        ("rules = 3\n", "top-level keys"),
    ],
)
def test_bad_files_name_file_key_value_and_what_is_allowed(tmp_path, text, expected):
    f = tmp_path / "bad.toml"
    f.write_text(text)
    with pytest.raises(UserError, match=expected) as info:
        load_mapping_table([f])
    assert "bad.toml" in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(UserError, match="not found"):
        load_mapping_table([tmp_path / "nope.toml"])
