"""``backfill``: find the echo SR studies of an archive, retrieve their SR objects, and have
each study graded and its result delivered by the node's own grading and delivery.

Nothing here grades.  Retrieved objects go through the node's intake
(:class:`~service.network.listener.ObjectIntake`: checks, object stored and recorded in the
journal),
exactly as objects received by C-STORE; the node's grading and delivery then take the study
from the journal, with the same settle window, merge rules, result identity, routes, retries
and failure reasons.  Who grades:

* no node runs on the data directory: backfill starts the node's grading and delivery roles
  in this process (no listener) for the length of the run;
* a node runs on it: that node's grading and delivery do the work (they read the shared
  journal), and backfill only retrieves and watches;
* ``--move-to AET``: the archive sends the objects by C-MOVE to the node with that AE title,
  which must be the node running on the data directory (so backfill can watch its journal).

One study at a time: its SR objects are listed (own results left out), retrieved in full
into memory (an SR is small), and only then handed to the intake, so a study whose retrieve
fails half-way records nothing and is tried again by the next run.  Progress is kept in the
journal's backfill tables (:mod:`service.store.backfill_journal`): a run stopped by Ctrl-C, by an
archive that went away, or by a crash, is continued by the next run with the same arguments;
studies done under the same rules are skipped.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import logging
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from types import SimpleNamespace
from typing import Any, TypeVar

from service import SOFTWARE_NAME, __version__
from service.archive.model import (
    Archive,
    ArchivedInstance,
    ArchivedStudy,
    ArchiveError,
    ArchiveUnavailable,
    NoSrObjects,
    StudyGone,
)
from service.backfill.progress import PlainProgress, Progress
from service.config import Config
from service.errors import UserError
from service.network.listener import Arrival, ObjectIntake, Received
from service.observability.logs import event
from service.store.backfill_journal import RunState
from service.store.journal import Journal, open_journal

log = logging.getLogger("diastolic_sr.backfill")

T = TypeVar("T")

#: journal study states after grading
_FINAL = ("graded", "delivered", "failed")
#: longest pause between two tries of an archive that stopped answering, seconds
_MAX_PAUSE = 15.0


@dataclass(frozen=True)
class BackfillOptions:
    since: date | None = None
    until: date | None = None
    #: at most this many studies retrieved in this run (studies skipped as done do not count)
    limit: int | None = None
    #: retrieve by C-MOVE to this AE title (DIMSE archives)
    move_to: str = ""
    #: at most this many studies started per minute
    rate: float | None = None
    dry_run: bool = False
    #: wait this long for an archive that stopped answering before the run stops
    retry_for: float = 120.0
    #: wait this long without any progress for grading and first delivery attempts
    wait_seconds: float = 600.0


@dataclass
class Summary:
    source: str
    retrieve: str
    state: str = RunState.running.value
    found: int = 0
    #: studies this run set out to do (found, less those skipped as done, at most --limit)
    to_do: int = 0
    objects: int = 0
    graded: int = 0
    delivered: int = 0
    skipped: int = 0
    failed: list[tuple[str, str]] = field(default_factory=list)
    #: graded studies whose delivery is still being retried: (study, last error)
    delivery_pending: list[tuple[str, str]] = field(default_factory=list)
    #: studies not finished in this run (stopped, or still waiting for grading)
    left: int = 0
    #: studies left for a later run by --limit
    beyond_limit: int = 0
    #: studies skipped, by reason
    skipped_reasons: dict[str, int] = field(default_factory=dict)
    outcomes: dict[str, int] = field(default_factory=dict)
    elapsed: float = 0.0
    note: str = ""
    #: queries and retrieves asked again (an archive that stopped answering, a lost answer)
    retries: int = 0
    #: seconds from the start until the last study was retrieved (the rest of ``elapsed`` is
    #: the grading and delivery of the last studies)
    retrieve_seconds: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return {
            "source": self.source,
            "retrieve": self.retrieve,
            "state": self.state,
            "found": self.found,
            "to_do": self.to_do,
            "objects": self.objects,
            "graded": self.graded,
            "delivered": self.delivered,
            "skipped": self.skipped,
            "skipped_reasons": dict(self.skipped_reasons),
            "failed": [{"study": s, "reason": r} for s, r in self.failed],
            "delivery_pending": [{"study": s, "reason": r} for s, r in self.delivery_pending],
            "left": self.left,
            "beyond_limit": self.beyond_limit,
            "outcomes": dict(self.outcomes),
            "elapsed_seconds": round(self.elapsed, 3),
            "retries": self.retries,
            "retrieve_seconds": round(self.retrieve_seconds, 3),
            "note": self.note,
        }


class Stopped(Exception):
    """The run was asked to stop (Ctrl-C)."""


def rules_key(config: Config, calling_ae: str) -> str:
    """Digest of what decides a study's result besides its sources: the grading options for
    studies recorded under ``calling_ae``, the mapping table in force, the software version
    and the result document's layout (the parts of the result's identity,
    :func:`service.pipeline.result_identity`, that do not come from the sources)."""
    from service.network.grader import grade_options
    from service.sr.identity import config_digest
    from service.sr.write import DOCUMENT_LAYOUT
    from service.vocabulary.mapper import load_mapping_table

    table = load_mapping_table(config.mapping_paths)
    return config_digest(
        {
            "options": grade_options(config, calling_ae).model_dump(mode="json"),
            "mapping": table.digest,
            "version": __version__,
            "layout": DOCUMENT_LAYOUT,
        }
    )[:32]


def own_result_series(config: Config, study_uid: str) -> str:
    """The Series Instance UID of the node's results in ``study_uid`` (derived, as
    :func:`service.pipeline.result_identity` derives it)."""
    from service.sr.identity import derive_uid

    return derive_uid(SOFTWARE_NAME, "series", study_uid, root=config.grading.uid_root or None)


# ---------------------------------------------------------------------------------------------
# The node's roles the run works with
# ---------------------------------------------------------------------------------------------


class Roles:
    """The journal of the data directory and the node's intake, with the grading and
    delivery roles: those of the node running there, or started in this process (no
    listener) the first time a study is handed over (:meth:`grading`), so a run with nothing
    to grade starts nothing."""

    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        node_running: bool,
        node_ae: str = "",
        grade_fn: Any = None,
        poll_seconds: float = 0.5,
    ) -> None:
        self.config = config
        self.journal = journal
        #: a node runs on the data directory (its grading and delivery do the work)
        self.node_running = node_running
        self.node_ae = node_ae
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self._node: Any = None
        self._intake = ObjectIntake(SimpleNamespace(config=config), journal)

    def grading(self) -> ObjectIntake:
        """The intake, once the grading and delivery roles run."""
        if self.node_running or self._node is not None:
            return self._intake
        from service.network.service import Node

        node = Node(self.config, listen=False, grade_fn=self._grade_fn, poll_seconds=self._poll)
        node.start()
        self._node = node
        self._intake.on_received = node.wake_graders
        self._intake.metrics = node.metrics
        return self._intake

    def close(self) -> None:
        try:
            if self._node is not None:
                self._node.stop()
        finally:
            self.journal.close()


def node_running(data_dir: Path) -> bool:
    """A node (or another backfill) holds the data directory's lock."""
    lock = Path(data_dir) / "run" / "lock"
    if not lock.exists():
        return False
    with open(lock, "a") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            return True
        fcntl.flock(fh, fcntl.LOCK_UN)
    return False


@contextlib.contextmanager
def open_roles(
    config: Config, *, move_to: str = "", grade_fn: Any = None, poll_seconds: float = 0.5
) -> Iterator[Roles]:
    """The journal and intake of the data directory, with the grading and delivery roles of
    the node running there, or started in this process when needed (:meth:`Roles.grading`)."""
    from service.network.service import status_path

    data_dir = config.data_dir.resolve()
    running = node_running(data_dir)
    node_ae = config.node.ae_title
    if running:
        try:
            info = json.loads(status_path(data_dir).read_text())
        except (OSError, ValueError):
            info = {}
        node_ae = str(info.get("ae_title", "") or "")
        if move_to and node_ae and node_ae != move_to:
            raise UserError(
                f"--move-to {move_to}: the node running with data directory {data_dir} has AE "
                f"title {node_ae}; backfill can only follow objects moved to that node"
            )
    elif move_to:
        raise UserError(
            f"--move-to {move_to}: no node is running with data directory {data_dir}; start "
            f"the node with AE title {move_to} on it (diastolic-sr serve --data-dir "
            f"{data_dir}) so that it receives the moved objects and backfill can follow them"
        )
    roles = Roles(
        config,
        open_journal(config, max_connections=4),
        node_running=running,
        node_ae=node_ae,
        grade_fn=grade_fn,
        poll_seconds=poll_seconds,
    )
    try:
        yield roles
    finally:
        roles.close()


# ---------------------------------------------------------------------------------------------
# The run
# ---------------------------------------------------------------------------------------------


@dataclass
class _Watch:
    """A study handed to the grading: what to wait for."""

    generation: int
    graded: bool = False


class Backfill:
    def __init__(
        self,
        config: Config,
        archive: Archive,
        options: BackfillOptions,
        *,
        progress: Progress | None = None,
        stop: threading.Event | None = None,
        grade_fn: Any = None,
        poll_seconds: float = 0.5,
    ) -> None:
        self.config = config
        self.archive = archive
        self.options = options
        self.progress = progress or PlainProgress()
        self.stop = stop or threading.Event()
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self.rules = rules_key(config, archive.calling_ae)
        self.move_to = str(getattr(archive, "move_to", "") or "") if archive.moves else ""
        if self.move_to:
            kind = f"C-MOVE to {self.move_to}"
        else:
            kind = "WADO-RS" if archive.description.startswith("http") else "C-GET"
        self.summary = Summary(source=archive.description, retrieve=kind)
        self._watch: dict[str, _Watch] = {}
        self._done = 0
        self._started = time.monotonic()

    # -- entry point ------------------------------------------------------------------------------

    def run(self) -> Summary:
        self._started = time.monotonic()
        try:
            if self.options.dry_run:
                self._dry_run()
                return self.summary
            # the archive first: an archive that cannot be queried starts nothing
            opts = self.options
            try:
                studies = self._patiently(
                    lambda: self.archive.find_studies(opts.since, opts.until), "query"
                )
            except Stopped:
                self.summary.state = RunState.interrupted.value
                return self.summary
            with open_roles(
                self.config,
                move_to=self.move_to,
                grade_fn=self._grade_fn,
                poll_seconds=min(self._poll, 0.5),
            ) as roles:
                self._run(roles, studies)
        finally:
            self.summary.elapsed = time.monotonic() - self._started
            self.progress.stop()
            with contextlib.suppress(Exception):
                self.archive.close()
        return self.summary

    def _run(self, roles: Roles, studies: list[ArchivedStudy]) -> None:
        self.roles = roles
        self.log = roles.journal
        opts = self.options
        run_id = self.log.backfill_start_run(
            self.archive.description,
            opts.since.isoformat() if opts.since else "",
            opts.until.isoformat() if opts.until else "",
        )
        state = RunState.finished
        try:
            self.summary.found = len(studies)
            done = self.log.backfill_done_under(self.rules)
            todo = [s for s in studies if s.study_uid not in done]
            self._skip(len(studies) - len(todo), "already graded under the same rules")
            if opts.limit is not None and len(todo) > opts.limit:
                self.summary.beyond_limit = len(todo) - opts.limit
                todo = todo[: opts.limit]
            self.summary.to_do = len(todo)
            self.log.backfill_found(run_id, self.archive.description, [s.study_uid for s in todo])
            self.progress.start(len(todo), f"backfill from {self.archive.description}")
            self._advance()
            self._each(todo)
            self.summary.retrieve_seconds = time.monotonic() - self._started
            self._wait_for_grading()
            self._wait_for_delivery()
        except Stopped:
            state = RunState.interrupted
            self.summary.note = "stopped by request; run the same command again to continue"
            with contextlib.suppress(Exception):
                self._poll_watched()
                self._tally_delivery()
        except ArchiveError as exc:
            state = RunState.stopped
            self.summary.note = f"{exc}; run the same command again to continue"
            raise
        finally:
            self._settle_left()
            self.summary.state = state.value
            with contextlib.suppress(Exception):
                self.log.backfill_finish_run(run_id, state, self.summary.as_dict())

    # -- per study --------------------------------------------------------------------------------

    def _each(self, todo: list[ArchivedStudy]) -> None:
        interval = 60.0 / self.options.rate if self.options.rate else 0.0
        next_start = time.monotonic()
        for study in todo:
            self._pause_until(next_start)
            next_start = time.monotonic() + interval
            self._poll_watched()
            try:
                self._study(study)
            except StudyGone as exc:
                self._fail(study.study_uid, f"no longer in the archive: {exc}")
            except NoSrObjects:
                self.log.backfill_done(
                    study.study_uid, outcome="nothing to grade", reason="no SR", rules=self.rules
                )
                self._skip(1, "no SR object in the study", progress=True)
        self._poll_watched()

    def _study(self, study: ArchivedStudy) -> None:
        uid = study.study_uid
        journal = self.roles.journal
        found = self._patiently(lambda: self.archive.find_sr_instances(uid), "query")
        own = own_result_series(self.config, uid)
        wanted = [
            i for i in found if i.series_uid != own and journal.result(i.sop_instance_uid) is None
        ]
        if not found:
            # the study-level query said it holds SR objects: none is listed now
            raise StudyGone(f"study {uid} lists no SR object at {self.archive.description}")
        if not wanted:
            self._only_own_results(uid)
            return
        row = self.log.backfill_study(uid)
        have = {o["sop_instance_uid"] for o in journal.objects(uid)}
        wanted_uids = {i.sop_instance_uid for i in wanted}
        if wanted_uids <= have:
            # the journal holds every object already: nothing is retrieved again
            self.roles.grading()
            if row is None or row["rules"] not in ("", self.rules):
                # received earlier (by the node, or by a run under other rules): graded again
                # from the stored objects under the rules in force
                journal.request_regrade(uid)
            # else recorded by an earlier run that stopped before it saw the grading
            current = journal.study(uid)
            generation = int(current["generation"]) if current else 0
            self.log.backfill_retrieved(
                uid, rules=self.rules, sources=sorted(wanted_uids), generation=generation
            )
            self._watch[uid] = _Watch(generation)
            return
        if self.archive.moves:
            self._move(uid, wanted)
        else:
            self._fetch(uid, wanted)

    def _fetch(self, uid: str, wanted: list[ArchivedInstance]) -> None:
        """C-GET or WADO-RS into memory, then the intake, only when all arrived."""
        staged: dict[str, Arrival] = {}
        wanted_uids = {i.sop_instance_uid for i in wanted}

        def stage(arrival: Arrival) -> Received:
            if arrival.affected in wanted_uids:
                staged[arrival.affected] = arrival
            return Received(0x0000, arrival.affected)

        report = self._patiently(lambda: self.archive.retrieve(uid, wanted, stage), "retrieve")
        if not staged:
            why = "the retrieve returned nothing"
            detail = report.problem or (
                f"{report.completed} completed, {report.failed} failed sub-operations"
                if report.completed or report.failed
                else "no object matched"
            )
            self._fail(uid, f"{why} ({detail})")
            return
        if len(staged) < len(wanted_uids):
            missing = len(wanted_uids) - len(staged)
            self._fail(
                uid,
                f"retrieve incomplete: {len(staged)} of {len(wanted_uids)} SR objects arrived, "
                f"{missing} missing"
                + (f" ({report.problem})" if report.problem else "")
                + "; nothing recorded",
            )
            return
        intake = self.roles.grading()
        received = [intake.receive(staged[sop_uid]) for sop_uid in sorted(staged)]
        stored = [r for r in received if r.stored]
        # the node's own results (recognised by service.sr.provenance) are kept, not graded
        ignored = [r for r in received if r.ignored]
        refused = [r for r in received if not r.stored and not r.ignored]
        self.summary.objects += len(stored)
        if not stored and ignored and not refused:
            self._only_own_results(uid)
            return
        if not stored:
            self._fail(
                uid,
                "every retrieved object was refused by the node: "
                + "; ".join(f"{r.sop_instance_uid}: {r.reason}" for r in refused),
            )
            return
        self._handed_over(uid, [r.sop_instance_uid for r in stored])

    def _move(self, uid: str, wanted: list[ArchivedInstance]) -> None:
        """C-MOVE to the running node; then wait until its journal has every object."""
        journal = self.roles.journal
        wanted_uids = {i.sop_instance_uid for i in wanted}
        report = self._patiently(
            lambda: self.archive.retrieve(uid, wanted, lambda a: Received(0xC000)), "retrieve"
        )
        if report.completed == 0:
            detail = report.problem or f"{report.failed} failed sub-operations"
            self._fail(uid, f"the retrieve returned nothing (C-MOVE: {detail})")
            return
        deadline = time.monotonic() + max(30.0, self.config.limits.dimse_timeout)
        while True:
            have = {o["sop_instance_uid"] for o in journal.objects(uid)} & wanted_uids
            if have == wanted_uids or time.monotonic() > deadline:
                break
            self._sleep(0.05)
        if not have:
            self._fail(
                uid,
                f"moved ({report.completed} objects) but none arrived in the journal of "
                f"{self.config.data_dir}",
            )
            return
        self.summary.objects += len(have)
        if have != wanted_uids:
            log.warning(
                "study %s: %d of %d moved objects arrived; grading what arrived",
                uid,
                len(have),
                len(wanted_uids),
            )
        self._handed_over(uid, sorted(have))

    def _handed_over(self, uid: str, sources: list[str]) -> None:
        current = self.roles.journal.study(uid)
        generation = int(current["generation"]) if current else 0
        self.log.backfill_retrieved(uid, rules=self.rules, sources=sources, generation=generation)
        self._watch[uid] = _Watch(generation)
        event(
            "backfill_retrieved",
            f"backfill: study {uid}: {len(sources)} SR object(s) retrieved from "
            f"{self.archive.description}",
            study_uid=uid,
            objects=len(sources),
            source=self.archive.description,
        )

    # -- watching the grading and the delivery ---------------------------------------------------

    def _poll_watched(self) -> bool:
        """Update the studies handed to the grading; True when one changed."""
        changed = False
        if not self._watch:
            return changed
        journal = self.roles.journal
        for uid, watch in list(self._watch.items()):
            if watch.graded:
                continue
            row = journal.study(uid)
            if row is None or row["state"] not in _FINAL or row["generation"] < watch.generation:
                continue
            changed = True
            watch.graded = True
            result = journal.result(row["result_uid"]) if row["result_uid"] else None
            reason = str(row.get("reason") or "")
            if row["state"] == "failed" and not self._delivery_failed(uid):
                self.log.backfill_done(uid, outcome="not graded", reason=reason)
                self.summary.outcomes["not graded"] = self.summary.outcomes.get("not graded", 0) + 1
                self._fail(uid, f"not graded: {reason}", record=False)
                del self._watch[uid]
                continue
            # the Outcome token the journal records for the result (service.model.Outcome),
            # else its grade as recorded with it
            outcome = (journal.outcome_of(row["result_uid"]) if row["result_uid"] else None) or str(
                (result or {}).get("grade") or (result or {}).get("status") or "graded"
            )
            self.log.backfill_done(uid, outcome=outcome)
            self.summary.graded += 1
            self.summary.outcomes[outcome] = self.summary.outcomes.get(outcome, 0) + 1
            self._done += 1
            self._advance()
        return changed

    def _delivery_failed(self, study_uid: str) -> bool:
        """A delivery of the study's results failed (a study that failed otherwise was not
        graded: the pipeline refused it)."""
        return any(
            d["study_uid"] == study_uid for d in self.roles.journal.deliveries(states=["failed"])
        )

    def _wait_for_grading(self) -> None:
        last_change = time.monotonic()
        while any(not w.graded for w in self._watch.values()):
            if self._poll_watched():
                last_change = time.monotonic()
            elif time.monotonic() - last_change > self.options.wait_seconds:
                waiting = sum(1 for w in self._watch.values() if not w.graded)
                self.progress.note(
                    f"{waiting} retrieved stud{'y' if waiting == 1 else 'ies'} not graded after "
                    f"{self.options.wait_seconds:g} s without progress; the node grades them "
                    "when it runs, and the next backfill run records them"
                )
                return
            self._sleep(self._poll)

    def _delivery_state(self) -> tuple[dict[str, str], set[str]]:
        """Studies whose deliveries are still being retried (with the last error), and those
        with a delivery not yet attempted."""
        retrying: dict[str, str] = {}
        untried: set[str] = set()
        for d in self.roles.journal.deliveries(states=["pending"]):
            if d["study_uid"] not in self._watch:
                continue
            if d["attempts"] == 0:
                untried.add(d["study_uid"])
            else:
                retrying.setdefault(d["study_uid"], f"{d['destination']}: {d['last_error']}")
        return retrying, untried

    def _wait_for_delivery(self) -> None:
        last_change, last = time.monotonic(), None
        while True:
            retrying, untried = self._delivery_state()
            if not untried:
                break
            if (len(untried), len(retrying)) != last:
                last, last_change = (len(untried), len(retrying)), time.monotonic()
            elif time.monotonic() - last_change > self.options.wait_seconds:
                break
            self._sleep(self._poll)
        self._tally_delivery()

    def _tally_delivery(self) -> None:
        """Delivered, failed and still pending, among the studies graded in this run (as the
        journal has them now)."""
        retrying, untried = self._delivery_state()
        journal = self.roles.journal
        for uid, watch in self._watch.items():
            if not watch.graded:
                continue
            row = journal.study(uid) or {}
            if row.get("state") == "delivered":
                self.summary.delivered += 1
            elif row.get("state") == "failed":
                self.summary.failed.append((uid, str(row.get("reason") or "delivery failed")))
            elif uid in retrying or uid in untried:
                why = retrying.get(uid, "not attempted yet")
                self.summary.delivery_pending.append((uid, why))

    # -- bookkeeping -------------------------------------------------------------------------------

    def _only_own_results(self, uid: str) -> None:
        """The study holds no SR but this node's own results: done, nothing to grade."""
        why = "only results of this node"
        self.log.backfill_done(uid, outcome="nothing to grade", reason=why, rules=self.rules)
        self._skip(1, why, progress=True)

    def _skip(self, n: int, why: str, *, progress: bool = False) -> None:
        if n <= 0:
            return
        self.summary.skipped += n
        self.summary.skipped_reasons[why] = self.summary.skipped_reasons.get(why, 0) + n
        if progress:
            self._done += n
            self._advance()

    def _fail(self, uid: str, reason: str, *, record: bool = True) -> None:
        if record:
            self.log.backfill_failed(uid, reason)
        self.summary.failed.append((uid, reason))
        self._done += 1
        self._advance()
        self.progress.note(f"study {uid}: {reason}")
        event(
            "backfill_failed",
            f"backfill: study {uid}: {reason}",
            level=logging.WARNING,
            study_uid=uid,
            reason=reason,
        )

    def _advance(self) -> None:
        s = self.summary
        detail = f"graded {s.graded}, failed {len(s.failed)}"
        if self.summary.skipped:
            detail += f", skipped {s.skipped}"
        self.progress.advance(self._done, detail)

    def _settle_left(self) -> None:
        self.summary.left += max(0, self.summary.to_do - self._done)

    # -- waiting ---------------------------------------------------------------------------------

    def _sleep(self, seconds: float) -> None:
        if self.stop.wait(seconds):
            raise Stopped()

    def _pause_until(self, when: float) -> None:
        """Wait (for --rate) while keeping an eye on the grading."""
        while True:
            left = when - time.monotonic()
            if left <= 0:
                if self.stop.is_set():
                    raise Stopped()
                return
            self._sleep(min(left, self._poll))
            self._poll_watched()

    def _patiently(self, call: Callable[[], T], what: str) -> T:
        """``call``, tried again while the archive is unavailable, for ``retry_for`` seconds
        from the first failure (pauses doubling from 1 s, at most 15 s; none after an answer
        the DICOM library lost, which is asked again at once, at most 5 times in a row)."""
        first: float | None = None
        pause = 1.0
        lost = 0
        while True:
            if self.stop.is_set():
                raise Stopped()
            try:
                return call()
            except ArchiveUnavailable as exc:
                self.summary.retries += 1
                if getattr(exc, "immediate", False) and lost < 5:
                    lost += 1
                    log.warning("%s", exc)
                    continue
                now = time.monotonic()
                first = now if first is None else first
                if now - first >= self.options.retry_for:
                    raise ArchiveUnavailable(
                        f"{exc} (still after {self.options.retry_for:g} s)"
                    ) from None
                self.progress.note(f"{exc}; {what} tried again in {pause:g} s")
                self._sleep(pause)
                self._poll_watched()
                pause = min(pause * 2, _MAX_PAUSE)

    # -- dry run ---------------------------------------------------------------------------------

    def _dry_run(self) -> None:
        from service.store.sqlite_journal import journal_path

        opts = self.options
        studies = self._patiently(
            lambda: self.archive.find_studies(opts.since, opts.until), "query"
        )
        self.summary.found = len(studies)
        done: set[str] = set()
        results: Callable[[str], bool] = lambda _uid: False  # noqa: E731
        path = journal_path(self.config.data_dir.resolve())
        there = bool(self.config.journal.url) or path.exists()
        journal = open_journal(self.config, max_connections=1) if there else None
        try:
            if journal is not None:
                done = journal.backfill_done_under(self.rules)
                results = lambda uid: journal.result(uid) is not None  # noqa: E731
            todo = [s for s in studies if s.study_uid not in done]
            self._skip(len(studies) - len(todo), "already graded under the same rules")
            if opts.limit is not None and len(todo) > opts.limit:
                self.summary.beyond_limit = len(todo) - opts.limit
                todo = todo[: opts.limit]
            self.summary.to_do = len(todo)
            self.progress.start(len(todo), f"dry run against {self.archive.description}")
            for study in todo:
                if self.stop.is_set():
                    raise Stopped()
                try:
                    found = self._patiently(
                        lambda s=study: self.archive.find_sr_instances(s.study_uid), "query"
                    )
                except StudyGone as exc:
                    self.summary.failed.append((study.study_uid, str(exc)))
                    found = []
                except NoSrObjects:
                    self._skip(1, "no SR object in the study")
                    found = []
                own = own_result_series(self.config, study.study_uid)
                self.summary.objects += sum(
                    1 for i in found if i.series_uid != own and not results(i.sop_instance_uid)
                )
                self._done += 1
                self._advance()
            self.summary.state = RunState.finished.value
        except Stopped:
            self.summary.state = RunState.interrupted.value
        finally:
            if journal is not None:
                journal.close()
