"""Configuration for operations: every error path of the keys added for TLS, address pinning,
summary PDFs, retention, logging, the HTTP endpoint, guideline switches and per-sender special
situations gives a message naming the key path, the bad value and what is allowed; and the
``check-config`` command (valid file, invalid file, masked secrets, loadable output)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from service.cli import main as cli_main
from service.commands.check_config import effective_toml
from service.config import MASK, config_from_dict, load_config
from service.errors import UserError
from service.model import SpecialSituation

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "config" / "diastolic-sr.example.toml"


def _error(data: dict, base_dir: str = "") -> str:
    with pytest.raises(UserError) as info:
        config_from_dict(data, base_dir=base_dir)
    return str(info.value)


def test_address_pinning_rejects_a_bad_address_and_names_it():
    msg = _error({"access": {"calling_ae_addresses": {"HV_ECHO1": ["10.0.0.300"]}}})
    assert "access.calling_ae_addresses" in msg
    assert '"10.0.0.300" is not an IP address or network' in msg
    assert "10.0.0.0/24" in msg  # says what is allowed


def test_address_pinning_needs_an_address():
    msg = _error({"access": {"calling_ae_addresses": {"HV_ECHO1": []}}})
    assert 'access.calling_ae_addresses: {"HV_ECHO1": []} is not allowed' in msg
    assert "at least one address" in msg


def test_pinned_ae_must_be_in_the_allow_list_when_there_is_one():
    msg = _error(
        {
            "access": {
                "allowed_calling_aes": ["HV_ECHO1"],
                "calling_ae_addresses": {"HV_ECHO9": ["10.0.0.5"]},
            }
        }
    )
    assert 'access.calling_ae_addresses."HV_ECHO9": not in access.allowed_calling_aes' in msg
    assert "allowed: HV_ECHO1" in msg


def test_address_pinning_matches_addresses_and_networks():
    cfg = config_from_dict(
        {"access": {"calling_ae_addresses": {"E1": ["127.0.0.1"], "E2": ["10.1.0.0/16"]}}}
    )
    a = cfg.access
    assert a.address_allowed("E1", "127.0.0.1")
    assert not a.address_allowed("E1", "127.0.0.2")
    assert a.address_allowed("E2", "10.1.200.3")
    assert not a.address_allowed("E2", "10.2.0.1")
    assert a.address_allowed("UNPINNED", "192.0.2.1")  # not pinned: any address


def test_tls_enabled_needs_certificate_and_key():
    msg = _error({"tls": {"enabled": True}})
    assert 'tls.certificate: required when tls.enabled = true (a PEM file path); got ""' in msg
    assert "tls.private_key: required" in msg


def test_tls_client_certificates_need_a_ca_bundle(tmp_path):
    (tmp_path / "c.pem").write_text("x")
    msg = _error(
        {
            "tls": {
                "enabled": True,
                "certificate": "c.pem",
                "private_key": "c.pem",
                "require_client_certificate": True,
            }
        },
        base_dir=str(tmp_path),
    )
    assert "tls.ca_bundle: required when tls.require_client_certificate = true" in msg


def test_tls_file_that_does_not_exist_is_named(tmp_path):
    msg = _error(
        {"tls": {"enabled": True, "certificate": "nope.pem", "private_key": "nope.key"}},
        base_dir=str(tmp_path),
    )
    assert 'tls.certificate: "nope.pem" is not a readable file' in msg
    assert 'tls.private_key: "nope.key" is not a readable file' in msg


def test_tls_minimum_version_lists_choices():
    msg = _error({"tls": {"minimum_version": "1.0"}})
    assert 'tls.minimum_version: "1.0" is not allowed' in msg
    assert "'1.2' or '1.3'" in msg


def test_destination_summary_pdf_and_tls_are_booleans():
    dest = {"ae_title": "PACS", "host": "127.0.0.1", "port": 104, "summary_pdf": "perhaps"}
    msg = _error({"destinations": {"PACS_MAIN": dest}})
    assert 'destinations.PACS_MAIN.summary_pdf: "perhaps" is not allowed' in msg
    cfg = config_from_dict(
        {
            "destinations": {
                "A": {"ae_title": "A", "host": "127.0.0.1", "port": 104, "summary_pdf": True},
                "B": {"ae_title": "B", "host": "127.0.0.1", "port": 105},
            }
        }
    )
    assert cfg.summary_destinations("ANY") == ["A"]  # no routes: every destination


def test_guideline_that_is_not_implemented_in_full_is_refused():
    msg = _error({"grading": {"guideline": "bse-2024"}})
    assert 'grading.guideline: "bse-2024" is not available' in msg
    assert "allowed: ase-eacvi-2016, ase-2025" in msg


def test_guideline_switches_are_validated_with_their_choices():
    msg = _error({"grading": {"switches": {"ase2025": {"supplementary": "vote"}}}})
    assert 'grading.switches.ase2025.supplementary: "vote" is not allowed' in msg
    assert "'any', 'majority' or 'hierarchy'" in msg
    msg = _error({"grading": {"switches": {"ase2025": {"af": {"min_primary_for_normal": 9}}}}})
    assert "grading.switches.ase2025.af.min_primary_for_normal: 9 is not allowed" in msg
    msg = _error({"grading": {"switches": {"ase2016": {}}}})
    assert "grading.switches.ase2016: unknown key; allowed: ase2016_af, ase2025" in msg


def test_thresholds_are_not_configuration_keys():
    # a cut-off is part of the guideline's rule set, not a site setting
    msg = _error({"grading": {"e_prime_septal_cutoff": 7}})
    assert "grading.e_prime_septal_cutoff: unknown key" in msg


def test_per_sender_special_situations():
    msg = _error({"senders": {"HV_TX": {"special_situations": ["heart-transplnt"]}}})
    assert 'senders.HV_TX.special_situations[0]: "heart-transplnt" is not allowed' in msg
    assert "'heart-transplant'" in msg
    cfg = config_from_dict({"senders": {"HV_TX": {"special_situations": ["heart-transplant"]}}})
    assert cfg.grading_context("HV_TX").special_situations == {SpecialSituation.heart_transplant}
    assert cfg.grading_context("OTHER").special_situations == frozenset()


def test_retention_logging_http_and_summary_values():
    assert "retention.days: -1 is not allowed" in _error({"retention": {"days": -1}})
    msg = _error({"logging": {"format": "xml"}})
    assert 'logging.format: "xml" is not allowed' in msg and "'json' or 'text'" in msg
    msg = _error({"delivery": {"summary_page_size": "A3"}})
    assert 'delivery.summary_page_size: "A3" is not allowed' in msg and "'Letter'" in msg
    msg = _error({"node": {"port": 11112}, "http": {"port": 11112}})
    assert "http.port: 11112 is the DICOM port (node.port); choose another" in msg
    assert "http.port: 70000 is not allowed" in _error({"http": {"port": 70000}})


def test_defaults_keep_the_endpoint_on_loopback_and_logs_without_patient_identifiers():
    cfg = config_from_dict({})
    assert cfg.http.bind == "127.0.0.1"  # issue 5: loopback by default
    assert cfg.logging.include_patient_identifiers is False
    assert cfg.logging.format == "json"
    assert cfg.retention.days == 0  # nothing is deleted unless asked


# -- check-config --------------------------------------------------------------------------------


def test_check_config_on_the_example_prints_a_loadable_effective_configuration(capsys):
    assert cli_main(["check-config", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "valid" in out.splitlines()[0]
    reread = tomllib.loads(out)
    cfg = load_config(EXAMPLE)
    assert reread == cfg.masked()  # every default filled in, and nothing else
    assert "[grading.switches.ase2025]" in out


def test_check_config_masks_secrets(tmp_path, capsys):
    f = tmp_path / "node.toml"
    f.write_text('[tls]\nprivate_key_password = "s3cret-Harbour"\n')
    assert cli_main(["check-config", str(f)]) == 0
    out = capsys.readouterr().out
    assert "s3cret-Harbour" not in out
    assert f'private_key_password = "{MASK}"' in out
    assert cli_main(["check-config", "--json", str(f)]) == 0
    assert "s3cret-Harbour" not in capsys.readouterr().out
    assert "s3cret-Harbour" not in effective_toml(load_config(f))


def test_check_config_masks_a_destinations_password(tmp_path, capsys):
    f = tmp_path / "node.toml"
    f.write_text(
        '[destinations.PACS_MAIN]\nae_title = "PACS"\nhost = "127.0.0.1"\nport = 104\n'
        'username = "hv-node"\npassword = "s3cret-Harbour"\n'
    )
    assert cli_main(["check-config", str(f)]) == 0
    out = capsys.readouterr().out
    assert "s3cret-Harbour" not in out and f'password = "{MASK}"' in out
    assert 'username = "hv-node"' in out
    f.write_text(
        '[destinations.PACS_MAIN]\nae_title = "PACS"\nhost = "127.0.0.1"\nport = 104\n'
        'password = "s3cret-Harbour"\n'
    )
    assert cli_main(["check-config", str(f)]) == 2
    err = capsys.readouterr().err
    assert "destinations.PACS_MAIN.password: set destinations.PACS_MAIN.username too" in err
    assert "s3cret-Harbour" not in err


def test_check_config_fails_with_the_key_path(tmp_path, capsys):
    f = tmp_path / "bad.toml"
    f.write_text(
        '[destinations.PACS_MAIN]\nae_title = "PACS"\nhost = "127.0.0.1"\nport = 104\n\n'
        '[[routes]]\ncalling_ae = "*"\ndestinations = ["PACS2"]\n'
    )
    assert cli_main(["check-config", str(f)]) == 2
    err = capsys.readouterr().err
    assert 'routes[0].destinations[0]: unknown destination "PACS2"; defined: PACS_MAIN' in err
    assert "Traceback" not in err


def test_check_config_missing_file_and_bad_toml(tmp_path, capsys):
    assert cli_main(["check-config", str(tmp_path / "none.toml")]) == 2
    assert "cannot read configuration" in capsys.readouterr().err
    f = tmp_path / "broken.toml"
    f.write_text("[node\n")
    assert cli_main(["check-config", str(f)]) == 2
    assert "not valid TOML" in capsys.readouterr().err


def test_check_config_refuses_an_unreadable_mapping_file(tmp_path, capsys):
    f = tmp_path / "node.toml"
    f.write_text('[grading]\nmapping_files = ["site-missing.toml"]\n')
    assert cli_main(["check-config", str(f)]) == 2
    err = capsys.readouterr().err
    assert "grading.mapping_files:" in err and "site-missing.toml" in err


def test_check_config_refuses_a_key_that_does_not_match_its_certificate(tmp_path, capsys):
    from tlsutil import make_pki

    pki = make_pki(tmp_path / "pki")
    f = tmp_path / "node.toml"
    f.write_text(
        f'[tls]\nenabled = true\ncertificate = "{pki.server_cert}"\n'
        f'private_key = "{pki.client_key}"\n'
    )
    assert cli_main(["check-config", str(f)]) == 2
    err = capsys.readouterr().err
    assert "tls.certificate / tls.private_key: cannot load" in err


def test_configured_switches_and_sender_rhythm_reach_the_grading():
    from netutil import echo_sr

    from service.network.assembly import grade_options
    from service.pipeline import grade_study

    # E/septal e' 16.7 and IVRT 60 ms in AF (Nagueh 2016 JASE 29:277, AF section: E/septal
    # e' >= 11 and IVRT <= 65 ms suggest raised filling pressure; from memory)
    ds = echo_sr("switches", values={"mitral_e": 100.0, "e_prime_septal": 6.0, "ivrt": 60.0})
    outcomes = {}
    for mode in ("flags-only", "majority"):
        cfg = config_from_dict(
            {
                "senders": {"HV_AF": {"rhythm": "af"}},
                "grading": {"switches": {"ase2016_af": {"summary": mode}}},
            }
        )
        outcome = grade_study([ds], grade_options(cfg, "HV_AF"))
        assert outcome.assessment.pathway.value == "atrial-fibrillation"  # the sender's rhythm
        outcomes[mode] = outcome
    # flags-only: no combination rule stated, filling pressure left indeterminate (I-16-11)
    assert outcomes["flags-only"].assessment.filling_pressure.value == "indeterminate"
    assert outcomes["majority"].assessment.filling_pressure.value == "elevated"
    # a different rule reading is a different result instance
    assert outcomes["flags-only"].result_uid != outcomes["majority"].result_uid
