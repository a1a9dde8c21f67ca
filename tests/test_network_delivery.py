"""Delivery by the node: each destination on its own, warnings counted as stored, user identity
sent where configured.  In-process loopback nodes with the stand-in grading function; peers are
pynetdicom acceptors and a raw socket that trickles.  Every wait is bounded."""

from __future__ import annotations

import json
import logging
import time

import pytest
from netutil import LOOPBACK, TricklingPeer, fake_grade, merged, send, simple_sr, wait_for
from pynetdicom import evt

from service.network.demo_loop import ResultReceiver

pytestmark = pytest.mark.network

#: PS3.7 Annex C: the warning status codes (0001, Bxxx, 0107, 0116)
WARNINGS = [0x0001, 0x0107, 0x0116, 0xB000, 0xB006, 0xB007, 0xBFFF]


class _Pacs(ResultReceiver):
    """A storage SCP answering each C-STORE with the next of ``statuses`` (then success),
    noting the user identity each association brings."""

    def __init__(self, ae_title: str, statuses=()):
        super().__init__(ae_title)
        self._statuses = list(statuses)
        self.identities: list[tuple[int, bytes, bytes]] = []
        #: associations requested by the node
        self.associations = 0
        self.start()

    def _on_store(self, event):
        super()._on_store(event)
        return self._statuses.pop(0) if self._statuses else 0x0000

    def _on_user_id(self, event):
        self.identities.append((event.user_id_type, event.primary_field, event.secondary_field))
        return True, None

    def _on_requested(self, event):
        self.associations += 1

    def _handlers(self):
        return [
            *super()._handlers(),
            (evt.EVT_USER_ID, self._on_user_id),
            (evt.EVT_REQUESTED, self._on_requested),
        ]


@pytest.fixture
def peers():
    made = []

    def make(*args, **kw):
        p = _Pacs(*args, **kw)
        made.append(p)
        return p

    yield make
    for p in made:
        p.stop()


def _node(loopback_nodes, destinations: dict, extra: dict | None = None):
    data = {
        "destinations": destinations,
        "delivery": {
            "results_folder": "",
            "backoff_initial_seconds": 0.2,
            "backoff_max_seconds": 0.4,
        },
        "limits": {"shutdown_grace_seconds": 2},
        "http": {"enabled": False},
    }
    return loopback_nodes.start(merged(data, extra), grade_fn=fake_grade)


def _dest(ae: str, port: int, **kw) -> dict:
    return {"ae_title": ae, "host": LOOPBACK, "port": port, **kw}


def test_a_trickling_destination_delays_no_other(loopback_nodes, peers):
    good = peers("PACS_GOOD")
    with TricklingPeer(length=4096, interval=0.2) as slow:  # ~13 minutes for its answer
        node = _node(
            loopback_nodes,
            {"SLOW": _dest("PACS_SLOW", slow.port), "GOOD": _dest("PACS_GOOD", good.port)},
            {"limits": {"acse_timeout": 2, "dimse_timeout": 2, "network_timeout": 5}},
        )
        studies = [simple_sr() for _ in range(3)]
        t0 = time.monotonic()
        for ds in studies:
            assert send([ds], node.port) == [0]
        # the good PACS has every result long before one set-up with the slow one could end
        wait_for(lambda: len(good.uids()) == 3, 20)
        assert time.monotonic() - t0 < 10

        def slow_attempt_failed():
            rows = node.journal.deliveries(states=["pending"])
            return [r for r in rows if r["destination"] == "SLOW" and r["attempts"] >= 1]

        failed = wait_for(slow_attempt_failed, 20)
        assert "did not answer in time" in failed[0]["last_error"]
        assert slow.connections >= 1
    good_rows = [r for r in node.journal.deliveries() if r["destination"] == "GOOD"]
    assert {r["state"] for r in good_rows} == {"delivered"}


def test_warning_statuses_count_as_delivered_and_are_logged(loopback_nodes, peers, caplog):
    pacs = peers("PACS", statuses=WARNINGS)
    node = _node(loopback_nodes, {"PACS": _dest("PACS", pacs.port)})
    studies = [simple_sr() for _ in WARNINGS]
    caplog.set_level(logging.WARNING, logger="diastolic_sr")
    for ds in studies:
        assert send([ds], node.port) == [0]

    def all_delivered():
        return all(
            (node.journal.study(str(ds.StudyInstanceUID)) or {}).get("state") == "delivered"
            for ds in studies
        )

    wait_for(all_delivered, 30)
    rows = node.journal.deliveries()
    assert [r["attempts"] for r in rows] == [1] * len(WARNINGS)  # none was retried
    logged = [r for r in caplog.records if "stored with a warning" in r.getMessage()]
    codes = {r.getMessage().rsplit("status 0x", 1)[1][:4] for r in logged}
    assert codes == {f"{c:04X}" for c in WARNINGS}
    assert all(r.levelno == logging.WARNING for r in logged)


def test_a_failure_status_is_retried(loopback_nodes, peers):
    pacs = peers("PACS", statuses=[0xA700])  # PS3.4 B.2.3: out of resources
    node = _node(loopback_nodes, {"PACS": _dest("PACS", pacs.port)})
    ds = simple_sr()
    assert send([ds], node.port) == [0]
    wait_for(
        lambda: (node.journal.study(str(ds.StudyInstanceUID)) or {}).get("state") == "delivered", 20
    )
    (row,) = node.journal.deliveries()
    assert row["attempts"] == 2  # the refusal, then the success
    assert len(pacs.uids()) == 2


def test_user_identity_goes_to_the_destination_that_asks_for_it(loopback_nodes, peers, capsys):
    with_id, without = peers("PACS_ID"), peers("PACS_PLAIN")
    node = _node(
        loopback_nodes,
        {
            "ID": _dest("PACS_ID", with_id.port, username="hv-node", password="s3cret"),
            "PLAIN": _dest("PACS_PLAIN", without.port),
        },
    )
    ds = simple_sr()
    assert send([ds], node.port) == [0]
    wait_for(lambda: with_id.uids() and without.uids(), 20)
    # PS3.7 D.3.3.7: user identity type 2 (username and passcode)
    assert with_id.identities == [(2, b"hv-node", b"s3cret")]
    assert without.identities == []
    assert "s3cret" not in json.dumps(node.config.masked())


def test_results_graded_one_after_another_go_over_one_association(loopback_nodes, peers):
    # the sender keeps an association whose deliveries are sent open for a moment
    # (LINGER_SECONDS), so a stream of studies graded one by one reaches the PACS over one
    # association rather than one each; once idle past it, the association is released
    from service.network.sender import LINGER_SECONDS

    pacs = peers("PACS")
    node = _node(loopback_nodes, {"PACS": _dest("PACS", pacs.port)})
    first, second, third = simple_sr(), simple_sr(), simple_sr()
    assert send([first], node.port) == [0]
    wait_for(lambda: len(pacs.uids()) == 1, 20)
    assert send([second], node.port) == [0]  # graded and due well within the linger
    wait_for(lambda: len(pacs.uids()) == 2, 20)
    assert pacs.associations == 1
    time.sleep(LINGER_SECONDS + 1.0)  # idle past the linger: released
    assert send([third], node.port) == [0]
    wait_for(lambda: len(pacs.uids()) == 3, 20)
    assert pacs.associations == 2
