"""Configuration: embedded defaults, validation messages (key path, bad value, what is allowed),
command-line overrides, routing, and the commented example file."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.config import (
    DEFAULT_ROUTE,
    AssemblyConfig,
    Config,
    apply_overrides,
    config_from_dict,
    default_config,
    load_config,
    parse_forward,
)
from service.errors import UserError
from service.model import Guideline, Rhythm

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "config" / "diastolic-sr.example.toml"


def _error(data: dict) -> str:
    with pytest.raises(UserError) as info:
        config_from_dict(data)
    return str(info.value)


def test_embedded_defaults_start_a_node_that_writes_results_to_a_folder():
    cfg = default_config()
    assert cfg.node.ae_title == "DIASTOLIC_SR"
    assert cfg.node.port == 11112  # common practice: 11112 is the registered DICOM port
    assert cfg.node.bind == ""  # all interfaces
    assert cfg.assembly.settle_seconds == 10.0  # issue 3: 10 s settle window by default
    assert cfg.limits.max_associations >= 8  # issue 3: at least 8 simultaneous associations
    assert cfg.destinations == {}
    assert cfg.results_dir == cfg.data_dir / "results"
    assert cfg.grading.guideline is Guideline.ase_eacvi_2016
    assert load_config(None) == cfg


def test_unknown_key_names_its_path_and_the_allowed_keys():
    msg = _error({"node": {"ae_titel": "X"}})
    assert "node.ae_titel: unknown key" in msg
    assert "allowed: ae_title, bind, port, data_dir" in msg


def test_unknown_top_level_section():
    msg = _error({"nodes": {}})
    assert "nodes: unknown key" in msg
    assert "node" in msg and "destinations" in msg


def test_route_to_an_undefined_destination():
    msg = _error(
        {
            "destinations": {
                "PACS_MAIN": {"ae_title": "PACS", "host": "127.0.0.1", "port": 104},
                "ARCHIVE": {"ae_title": "ARCH", "host": "127.0.0.1", "port": 105},
            },
            "routes": [
                {"calling_ae": "ECHO1", "destinations": ["PACS_MAIN"]},
                {"calling_ae": "ECHO2", "destinations": ["ARCHIVE"]},
                {"calling_ae": "ECHO3", "destinations": ["PACS2"]},
            ],
        }
    )
    assert (
        'routes[2].destinations[0]: unknown destination "PACS2"; defined: ARCHIVE, PACS_MAIN'
        in (msg)
    )


def test_bad_enum_value_lists_the_choices():
    msg = _error({"grading": {"guideline": "ase-2099"}})
    assert 'grading.guideline: "ase-2099" is not allowed' in msg
    assert "ase-eacvi-2016" in msg


def test_bad_ae_title_says_what_an_ae_title_is():
    # PS3.5 Table 6.2-1: AE is at most 16 characters, no backslash
    msg = _error({"node": {"ae_title": "A" * 17}})
    assert 'node.ae_title: "AAAAAAAAAAAAAAAAA" is not allowed' in msg
    assert "1 to 16" in msg
    assert "backslash" in _error({"access": {"allowed_calling_aes": ["OK", "BAD\\AE"]}})
    assert "access.allowed_calling_aes[1]" in _error(
        {"access": {"allowed_calling_aes": ["OK", ""]}}
    )


def test_numbers_out_of_range_and_missing_keys():
    assert "node.port: 70000 is not allowed" in _error({"node": {"port": 70000}})
    assert "limits.max_associations: 4 is not allowed" in _error(
        {"limits": {"max_associations": 4}}
    )
    assert "assembly.settle_seconds: -1 is not allowed" in _error(
        {"assembly": {"settle_seconds": -1}}
    )
    msg = _error({"destinations": {"PACS": {"ae_title": "PACS", "host": "127.0.0.1"}}})
    assert "destinations.PACS.port: required key missing" in msg


def test_uid_root_must_be_dotted_digits():
    # PS3.5 9.1: UID components are digits without leading zeros
    assert "grading.uid_root" in _error({"grading": {"uid_root": "1.02.3"}})
    assert config_from_dict({"grading": {"uid_root": "1.2.826.0.1.3680043.10.999"}})


def test_backoff_max_below_initial_is_refused():
    msg = _error({"delivery": {"backoff_initial_seconds": 10, "backoff_max_seconds": 5}})
    assert "delivery.backoff_max_seconds" in msg


def test_file_errors_are_one_line_user_errors(tmp_path):
    with pytest.raises(UserError, match="cannot read configuration"):
        load_config(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[node\nport = 1\n")
    with pytest.raises(UserError, match="not valid TOML"):
        load_config(bad)
    wrong = tmp_path / "wrong.toml"
    wrong.write_text('[node]\nport = "eleven"\n')
    with pytest.raises(UserError, match=r'node\.port: "eleven" is not allowed'):
        load_config(wrong)


def test_relative_paths_are_taken_from_the_configuration_folder(tmp_path):
    f = tmp_path / "site" / "node.toml"
    f.parent.mkdir()
    f.write_text(
        '[node]\ndata_dir = "data"\n[grading]\nmapping_files = ["maps/site.toml"]\n'
        '[delivery]\nresults_folder = "out"\n'
    )
    cfg = load_config(f)
    assert cfg.data_dir == f.parent.resolve() / "data"
    assert cfg.results_dir == f.parent.resolve() / "data" / "out"
    assert cfg.mapping_paths == [f.parent.resolve() / "maps" / "site.toml"]


def test_routing_table_and_default_route():
    cfg = config_from_dict(
        {
            "destinations": {
                "PACS_MAIN": {"ae_title": "PACS", "host": "127.0.0.1", "port": 104},
                "ARCHIVE": {"ae_title": "ARCH", "host": "127.0.0.1", "port": 105},
            },
            "routes": [
                {"calling_ae": "ECHO1", "destinations": ["ARCHIVE", "PACS_MAIN"]},
                {"calling_ae": DEFAULT_ROUTE, "destinations": ["PACS_MAIN"]},
            ],
        }
    )
    assert cfg.destinations_for("ECHO1") == ["ARCHIVE", "PACS_MAIN"]
    assert cfg.destinations_for("ECHO1  ") == ["ARCHIVE", "PACS_MAIN"]  # AE padding
    assert cfg.destinations_for("OTHER") == ["PACS_MAIN"]
    no_default = config_from_dict(
        {
            "destinations": {"P": {"ae_title": "PACS", "host": "127.0.0.1", "port": 104}},
            "routes": [{"calling_ae": "ECHO1", "destinations": ["P"]}],
        }
    )
    assert no_default.destinations_for("OTHER") == []
    no_routes = config_from_dict(
        {"destinations": {"P": {"ae_title": "PACS", "host": "127.0.0.1", "port": 104}}}
    )
    assert no_routes.destinations_for("ANY") == ["P"]


def test_duplicate_route_is_refused():
    msg = _error({"routes": [{"calling_ae": "E1"}, {"calling_ae": "E1"}]})
    assert 'routes[1].calling_ae: "E1" already routed by routes[0]' in msg


def test_sender_defaults_feed_the_grading_context():
    cfg = config_from_dict(
        {
            "grading": {"lvef_reduced_below": 45, "defaults": {"rhythm": "sinus"}},
            "senders": {"ECHO_AF": {"rhythm": "af", "myocardial_disease": True}},
        }
    )
    ctx = cfg.grading_context("ECHO_AF")
    assert ctx.rhythm is Rhythm.af and ctx.myocardial_disease
    assert ctx.lvef_reduced_below == 45
    assert cfg.grading_context("OTHER").rhythm is Rhythm.sinus
    assert "senders" in _error({"senders": {"BAD\\AE": {}}})
    assert "senders.X.rhythm" in _error({"senders": {"X": {"rhythm": "irregular"}}})


def test_command_line_overrides_beat_the_file():
    base = config_from_dict(
        {
            "node": {"port": 104, "ae_title": "FROMFILE"},
            "destinations": {"P": {"ae_title": "PACS", "host": "127.0.0.1", "port": 104}},
            "routes": [
                {"calling_ae": "ECHO1", "destinations": ["P"]},
                {"calling_ae": "*", "destinations": ["P"]},
            ],
        }
    )
    cfg = apply_overrides(
        base,
        port=0,
        ae_title="FROMFLAG",
        bind="127.0.0.1",
        settle_seconds=0.25,
        forward=["PACS_B@127.0.0.1:11113", "PACS_C@localhost:11114"],
        data_dir="/tmp/dsr-data",
    )
    assert (cfg.node.port, cfg.node.ae_title, cfg.node.bind) == (0, "FROMFLAG", "127.0.0.1")
    assert cfg.assembly.settle_seconds == 0.25
    assert cfg.data_dir == Path("/tmp/dsr-data")
    assert cfg.destinations["FORWARD_1"].port == 11113
    assert cfg.destinations_for("OTHER") == ["P", "FORWARD_1", "FORWARD_2"]
    assert cfg.destinations_for("ECHO1") == ["P"]
    assert isinstance(apply_overrides(default_config()), Config)


def test_forward_syntax_errors():
    assert parse_forward("PACS@127.0.0.1:104").ae_title == "PACS"
    for bad in ("PACS127.0.0.1:104", "PACS@127.0.0.1", "PACS@127.0.0.1:0", "@h:1"):
        with pytest.raises(UserError, match="--forward"):
            parse_forward(bad)
    with pytest.raises(UserError, match=r"assembly\.settle_seconds"):
        apply_overrides(default_config(), settle_seconds=-2)


def test_example_file_is_valid_and_documents_every_section():
    cfg = load_config(EXAMPLE)
    text = EXAMPLE.read_text()
    for section in ("[node]", "[limits]", "[access]", "[assembly]", "[grading]", "[delivery]"):
        assert section in text
    assert "[destinations." in text and "[[routes]]" in text
    assert cfg.destinations, "the example shows at least one destination"
    # every key line is preceded by a comment somewhere in its section (commented example)
    assert text.count("#") > 40


@pytest.mark.parametrize("cores, graders", [(1, 1), (2, 1), (4, 3), (8, 7), (32, 15)])
def test_default_graders_leave_a_core_to_the_receiver_and_the_sender(monkeypatch, cores, graders):
    """One grading process per core but one (at least one, at most 16 cores counted): the
    receiver and the sender share the core left (docs/performance.md, "Grading processes")."""
    import os

    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(cores)), raising=False)
    assert AssemblyConfig().workers == graders
    assert AssemblyConfig(workers=min(cores, 16)).workers == min(cores, 16)  # the key decides
