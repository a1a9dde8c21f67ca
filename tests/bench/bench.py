"""diastolic-sr benchmarks: prints figures, asserts nothing about time.

Run from the repository root (the venv active, DCMTK in /usr/bin)::

    python tests/bench/bench.py                       # every section, N = 300
    python tests/bench/bench.py --n 1000 --sections receivers,offline
    python tests/bench/bench.py --sections memory --memory-at 1000,10000
    python tests/bench/bench.py --sections sender
    python tests/bench/bench.py --sections journals,nodes --rounds 3
    python tests/bench/bench.py --sections summary --rounds 5
    python tests/bench/bench.py --json figures.json   # also write the figures as JSON

Sections
--------
receivers  the same N studies (one SR each) sent by DCMTK ``storescu`` (TCP_NODELAY=1) to:
           pynetdicom's ``storescp`` app writing to disk, DCMTK ``storescp`` writing to disk,
           and diastolic-sr end to end (receive -> journal -> grade -> result SR -> delivered to
           a DCMTK ``storescp`` acting as the PACS; settle window 0).  Objects/s and ratios;
           ``--rounds`` (default 3) rounds, each receiver in turn, medians reported.  The PACS
           shares the machine: it writes results as received (``+B``), not parsed into
           DCMTK's object tree and written again (``--pacs-parses``); its CPU is printed.
journals   one node end to end on the SQLite journal and on a PostgreSQL journal (Debian
           postgresql started on loopback, a fresh database each round), the same load, with
           pynetdicom's ``storescp`` in each round for the ratio.
nodes      two nodes on one PostgreSQL journal against one node, each with one grading
           process: two ``storescu`` streams of N/2 studies at once, both to the one node or
           one to each node; end-to-end objects/s and their ratio (target >= 1.6).
latency    a steady offered load (default 10 studies/s, one ``storescu`` per study) through
           diastolic-sr; p50/p95/p99 from receipt (journal ``received_at``) to the result
           delivered to the PACS (journal ``delivered_at``).
offline    ``diastolic-sr grade`` on a folder of N files against a bare pydicom read-and-write
           of the same files (files/s).
summary    ``diastolic-sr grade --pdf --out`` against ``grade --out`` on the same files
           (default 500, ``--summary-n``), each a command of its own, taken in turn for
           ``--rounds`` rounds: files/s and the ratio (target >= 0.5), medians.
sender     the node's C-STORE sending (pynetdicom's requestor with deadlines, each result
           sent as encoded when the PACS accepted its transfer syntax) against pynetdicom
           sending the stored files as encoded, the same N result SRs to DCMTK ``storescp``
           over one association (objects/s, CPU per object).
memory     resident memory (VmRSS) of the node after 1 000 and 10 000 studies streamed.
journal    the journal's query times as it grows, and SQLite's query plan for each statement
           the service runs (is it indexed?).

Everything runs on loopback (127.0.0.1) in a temporary folder, removed afterwards unless
``--keep`` is given.  The load is invented (fictional "Harbour Vale Cardiac Centre").
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import io
import json
import math
import os
import resource
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
sys.path[:0] = [str(HERE), str(REPO / "tests"), str(REPO)]

from load import write_studies  # noqa: E402

LOOPBACK = "127.0.0.1"
STORESCU = "/usr/bin/storescu"
STORESCP = "/usr/bin/storescp"
ECHOSCU = "/usr/bin/echoscu"
NODE_AE = "DIASTOLIC_SR"
PACS_AE = "PACS"
SECTIONS = (
    "receivers",
    "journals",
    "nodes",
    "latency",
    "offline",
    "summary",
    "sender",
    "memory",
    "journal",
)


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------


def say(*parts: Any) -> None:
    print(*parts, flush=True)


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


def wait_for(cond: Callable[[], Any], timeout: float, interval: float = 0.02) -> Any:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = cond()
        if value:
            return value
        time.sleep(interval)
    raise TimeoutError(f"not reached within {timeout} s")


def echo_ok(port: int, called: str) -> bool:
    r = subprocess.run(
        [ECHOSCU, "-aec", called, "-to", "5", LOOPBACK, str(port)],
        capture_output=True,
        timeout=20,
    )
    return r.returncode == 0


def count_files(folder: Path) -> int:
    try:
        return sum(1 for p in folder.iterdir() if p.is_file() and not p.name.startswith("."))
    except FileNotFoundError:
        return 0


def percentile(values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile (common practice)."""
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    k = max(0, min(len(ordered) - 1, math.ceil(q / 100 * len(ordered)) - 1))
    return ordered[k]


def storescu_cmd(port: int, called: str, files: Sequence[Path]) -> list[str]:
    # -R: propose only the SOP classes of the files (storescu's default list lacks 88.72)
    return [
        STORESCU,
        "-R",
        "-aet",
        "SCANNER1",
        "-aec",
        called,
        "-to",
        "30",
        LOOPBACK,
        str(port),
        *map(str, files),
    ]


def storescu_env() -> dict[str, str]:
    return {**os.environ, "TCP_NODELAY": "1"}


def run_storescu(port: int, called: str, files: Sequence[Path]) -> float:
    """Send ``files`` over one association; the wall time in seconds."""
    t0 = time.perf_counter()
    r = subprocess.run(
        storescu_cmd(port, called, files),
        env=storescu_env(),
        capture_output=True,
        text=True,
        timeout=3600,
    )
    elapsed = time.perf_counter() - t0
    if r.returncode != 0:
        raise RuntimeError(f"storescu failed ({r.returncode}): {r.stderr[-2000:]}")
    return elapsed


#: studies each receiver takes before a timed load, so that every figure is of a running
#: receiver (imports done, processes started), as a node in service is: a node's grading and
#: sending processes start after its listener answers, and a cold start would be counted as
#: throughput (on a 300-study load it halved the node's end-to-end figure)
WARM_UP = 8


def warm_up_files(work: Path, tag: str) -> list[Path]:
    """Studies of their own (UIDs of their own) for a receiver's warm-up."""
    return write_studies(work / f"warm-up-{tag}", WARM_UP, run=f"warm-up-{tag}")


def warm_up(port: int, called: str, files: Sequence[Path], done: Callable[[], bool]) -> None:
    """Send the warm-up studies and wait until ``done`` (all of them stored, or settled)."""
    run_storescu(port, called, files)
    wait_for(done, 120)


@contextlib.contextmanager
def process(cmd: Sequence[str], log: Path, **kw: Any) -> Iterator[subprocess.Popen[bytes]]:
    with open(log, "ab") as fh:
        proc = subprocess.Popen(list(cmd), stdout=fh, stderr=subprocess.STDOUT, **kw)
    try:
        yield proc
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(30)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(10)


#: the DCMTK storescp acting as the node's PACS writes what it receives as received
#: (``+B``), not parsed and written again; ``--pacs-parses`` turns this off
PACS_AS_RECEIVED = True
#: the nodes' spare grading processes (``assembly.spare_workers``; None: the node's default);
#: ``--spare-workers``
SPARE_WORKERS: int | None = None


@contextlib.contextmanager
def dcmtk_storescp(
    out: Path, port: int, log: Path, ae: str = PACS_AE, *, as_received: bool = False
) -> Iterator[Path]:
    """DCMTK storescp writing to ``out``; ``as_received``: bit-preserving (``+B``), the data
    set written as it arrived instead of parsed into DCMTK's object tree and encoded again
    (a result of some 150 nested content items costs it about 2.5 ms of CPU that way, against
    0.5 ms as received: CPU taken from the node, which shares the machine with its PACS)."""
    out.mkdir(parents=True, exist_ok=True)
    # TCP_NODELAY=1: DCMTK reads it on both sides; without it Nagle's algorithm and delayed
    # acknowledgements hold every small response ~40 ms (then storescp would measure the kernel)
    bits = ["+B"] if as_received else []
    cmd = [STORESCP, "-aet", ae, "-od", str(out), "+uf", *bits, str(port)]
    with process(cmd, log, env=storescu_env()) as proc:
        wait_for(lambda: proc.poll() is not None or echo_ok(port, ae), 20)
        if proc.poll() is not None:
            raise RuntimeError(f"DCMTK storescp exited early; see {log}")
        yield out


def pacs_storescp(out: Path, port: int, log: Path) -> contextlib.AbstractContextManager[Path]:
    """The DCMTK storescp that acts as the node's PACS (see :data:`PACS_AS_RECEIVED`)."""
    return dcmtk_storescp(out, port, log, as_received=PACS_AS_RECEIVED)


@contextlib.contextmanager
def pynetdicom_storescp(
    out: Path, port: int, log: Path, ae: str = "BASE", *, durable: bool = False
) -> Iterator[Path]:
    """pynetdicom's ``storescp`` app writing to ``out``; ``durable``: each file and its folder
    fsync'ed before the response (``durable_storescp.py``, the app with only that changed)."""
    out.mkdir(parents=True, exist_ok=True)
    app = [str(HERE / "durable_storescp.py")] if durable else ["-m", "pynetdicom", "storescp"]
    cmd = [
        sys.executable,
        *app,
        str(port),
        "-aet",
        ae,
        "-od",
        str(out),
        "-ba",
        LOOPBACK,
        "-q",
    ]
    with process(cmd, log) as proc:
        wait_for(lambda: proc.poll() is not None or echo_ok(port, ae), 30)
        if proc.poll() is not None:
            raise RuntimeError(f"pynetdicom storescp exited early; see {log}")
        yield out


NODE_CONFIG = """
[assembly]
settle_seconds = 0
{workers}
[delivery]
results_folder = ""
backoff_initial_seconds = 0.2
backoff_max_seconds = 2
"""


def _status_kib(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of a process in KiB, from /proc (0 when it has gone)."""
    rss = hwm = 0
    try:
        lines = Path(f"/proc/{pid}/status").read_text().splitlines()
    except OSError:
        return 0, 0
    for line in lines:
        if line.startswith("VmRSS:"):
            rss = int(line.split()[1])
        elif line.startswith("VmHWM:"):
            hwm = int(line.split()[1])
    return rss, hwm


def _cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far, from /proc (0 when it has gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _args(pid: int) -> list[bytes] | None:
    """A process's command line, argument by argument, from /proc (None when it has gone)."""
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().split(b"\0")
    except OSError:
        return None


def _role_of(pid: int) -> str:
    """A node's process by its role: supervisor, receiver, grader, spare grader, sender."""
    args = _args(pid)
    if args is None:
        return "?"
    if b"service.network.roles" in args:
        role = args[args.index(b"service.network.roles") + 1].decode()
        return f"spare {role}" if b"--spare" in args else role
    return "supervisor"


def _descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (from the parent ids in /proc/*/stat)."""
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        children.setdefault(ppid, []).append(int(entry.name))
    out, todo = [], [pid]
    while todo:
        for child in children.get(todo.pop(), []):
            out.append(child)
            todo.append(child)
    return out


class Node:
    """``diastolic-sr serve`` as a subprocess, forwarding results to the PACS; on the SQLite
    journal in its data folder, or on the PostgreSQL journal ``journal`` (a URL; the password
    ``pg_password`` goes in PGPASSWORD)."""

    def __init__(
        self,
        work: Path,
        pacs_port: int,
        *,
        workers: int | None,
        name: str,
        journal: str = "",
        pg_password: str = "",
        cpus: set[int] | None = None,
        spare_workers: int | None = None,
    ) -> None:
        self.data = work / f"{name}-data"
        #: the CPUs the node and all its processes may run on (None: any)
        self.cpus = cpus
        self.config = work / f"{name}.toml"
        # None: the node's own default (assembly.workers, assembly.spare_workers left out)
        lines = [] if workers is None else [f"workers = {workers}"]
        spare = SPARE_WORKERS if spare_workers is None else spare_workers
        lines += [] if spare is None else [f"spare_workers = {spare}"]
        self.config.write_text(NODE_CONFIG.format(workers="\n".join(lines)))
        self.log = work / f"{name}.log"
        self.pacs_port = pacs_port
        self.port = free_port()
        self.journal_url = journal
        self.pg_password = pg_password
        self.proc: subprocess.Popen[bytes] | None = None
        self._journal: Any = None

    def __enter__(self) -> Node:
        cmd = [
            sys.executable,
            "-m",
            "service.cli",
            "serve",
            "--config",
            str(self.config),
            "--bind",
            LOOPBACK,
            "--port",
            str(self.port),
            "--data-dir",
            str(self.data),
            "--forward",
            f"{PACS_AE}@{LOOPBACK}:{self.pacs_port}",
            "--log-level",
            "WARNING",
        ]
        env = dict(os.environ)
        if self.journal_url:
            cmd += ["--journal", self.journal_url]
            env["PGPASSWORD"] = self.pg_password
        with open(self.log, "ab") as fh:
            cpus = self.cpus
            self.proc = subprocess.Popen(
                cmd,
                cwd=REPO,
                stdout=fh,
                stderr=subprocess.STDOUT,
                env=env,
                # the affinity is inherited by every process the node starts
                preexec_fn=None if cpus is None else lambda: os.sched_setaffinity(0, cpus),
            )
        wait_for(lambda: self.proc.poll() is not None or echo_ok(self.port, NODE_AE), 60)
        if self.proc.poll() is not None:
            raise RuntimeError(f"node exited early; see {self.log}")
        return self

    def rss_kib(self) -> tuple[int, int]:
        """(VmRSS, VmHWM) of the node's own process in KiB."""
        assert self.proc is not None
        return _status_kib(self.proc.pid)

    def tree_rss_kib(self) -> int:
        """VmRSS of the node and every process below it (its grading processes), KiB."""
        assert self.proc is not None
        return sum(_status_kib(pid)[0] for pid in [self.proc.pid, *_descendants(self.proc.pid)])

    def journal_rows(self, sql: str, params: Sequence[Any] = ()) -> list[tuple]:
        """Rows of a read-only statement on the node's journal (``?`` parameters)."""
        if self.journal_url:
            if self._journal is None:
                from service.store.postgres_journal import PostgresJournal

                self._journal = PostgresJournal(self.journal_url, password=self.pg_password)
            return [tuple(r._values) for r in self._journal._query(sql, params)]
        db = sqlite3.connect(f"file:{self.data / 'journal.sqlite3'}?mode=ro", uri=True, timeout=30)
        try:
            return db.execute(sql, params).fetchall()
        finally:
            db.close()

    def delivered(self) -> int:
        try:
            return int(
                self.journal_rows("SELECT COUNT(*) FROM deliveries WHERE state = 'delivered'")[0][0]
            )
        except Exception:  # no journal yet
            return 0

    def settled(self) -> int:
        try:
            return int(
                self.journal_rows(
                    "SELECT COUNT(*) FROM studies WHERE state IN ('delivered', 'failed')"
                )[0][0]
            )
        except Exception:  # no journal yet
            return 0

    def __exit__(self, *exc: object) -> None:
        if self._journal is not None:
            self._journal.close()
            self._journal = None
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)


# ---------------------------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------------------------


def bench_receivers(work: Path, n: int, workers: int | None, rounds: int = 1) -> dict[str, Any]:
    """Each receiver takes the same load once per round, in turn (pynetdicom, DCMTK,
    diastolic-sr), so that a change in the machine's speed during the run (other virtual
    machines on the host) affects all three alike; figures are the medians over the rounds,
    the ratio the median of the rounds' own ratios."""
    say(
        f"\n== receivers: {n} studies, one SR each, DCMTK storescu (TCP_NODELAY=1), "
        f"{rounds} round(s); node grading processes: "
        f"{workers if workers is not None else 'its default'} =="
    )
    files = write_studies(work / "load", n, run="receivers")
    per_round = [_receivers_round(work / f"round{i + 1}", files, workers) for i in range(rounds)]
    for i, r in enumerate(per_round, 1):
        if rounds > 1:
            say(f"-- round {i}")
        say(
            f"pynetdicom storescp (to disk):     {r['pynetdicom_storescp']:8.1f} objects/s, "
            f"{r['pynetdicom_storescp_cpu_ms']:.1f} ms CPU per object"
        )
        say(
            f"pynetdicom storescp, durable:      {r['pynetdicom_durable']:8.1f} objects/s "
            "(each file and its folder fsync'ed before the response)"
        )
        say(f"DCMTK storescp (to disk):          {r['dcmtk_storescp']:8.1f} objects/s")
        say(
            f"diastolic-sr receive+journal:      {r['diastolic_sr_acknowledged']:8.1f} "
            "objects/s acknowledged"
        )
        say(
            f"diastolic-sr end to end:           {r['diastolic_sr_end_to_end']:8.1f} objects/s "
            f"({r['diastolic_sr_delivered']} results at the PACS, "
            f"{r['diastolic_sr_failed']} studies failed)"
        )
        say(
            "diastolic-sr CPU per study (ms):   "
            + ", ".join(f"{role} {ms:.1f}" for role, ms in sorted(r["cpu_ms_per_study"].items()))
            + f"; all {sum(r['cpu_ms_per_study'].values()):.1f}; "
            f"the PACS (DCMTK storescp, "
            f"{'as received' if PACS_AS_RECEIVED else 'parsing'}) "
            f"{r['pacs_cpu_ms_per_result']:.1f} per result"
        )
        say(
            f"ratio end to end / pynetdicom storescp: {r['ratio_to_pynetdicom']:.2f}; "
            f"/ durable pynetdicom storescp: {r['ratio_to_durable']:.2f}; durable / plain "
            f"pynetdicom storescp: {r['durable_to_pynetdicom']:.2f}"
        )
    keys = (
        "pynetdicom_storescp",
        "pynetdicom_durable",
        "ratio_to_durable",
        "durable_to_pynetdicom",
        "dcmtk_storescp",
        "diastolic_sr_acknowledged",
        "diastolic_sr_end_to_end",
        "ratio_to_pynetdicom",
        "ratio_to_dcmtk",
    )
    out: dict[str, Any] = {"n": n, "rounds": per_round}
    out.update({k: statistics.median(r[k] for r in per_round) for k in keys})
    out["diastolic_sr_delivered"] = min(r["diastolic_sr_delivered"] for r in per_round)
    out["diastolic_sr_failed"] = max(r["diastolic_sr_failed"] for r in per_round)
    if rounds > 1:
        say(f"-- median of {rounds} rounds")
        say(
            f"objects/s: pynetdicom storescp {out['pynetdicom_storescp']:.1f}, durable "
            f"{out['pynetdicom_durable']:.1f}, DCMTK storescp "
            f"{out['dcmtk_storescp']:.1f}, diastolic-sr acknowledged "
            f"{out['diastolic_sr_acknowledged']:.1f}, end to end "
            f"{out['diastolic_sr_end_to_end']:.1f}"
        )
    by_round = ", ".join(f"{r['ratio_to_pynetdicom']:.2f}" for r in per_round)
    say(
        f"ratio end to end / pynetdicom storescp: {out['ratio_to_pynetdicom']:.2f}   "
        f"/ DCMTK storescp: {out['ratio_to_dcmtk']:.2f}   (target >= 0.8 x pynetdicom)"
        + (f"; by round: {by_round}" if rounds > 1 else "")
    )
    say(
        f"ratio end to end / durable pynetdicom storescp: {out['ratio_to_durable']:.2f}; "
        f"durable / plain pynetdicom storescp: {out['durable_to_pynetdicom']:.2f}"
    )
    return out


def _receivers_round(work: Path, files: Sequence[Path], workers: int | None) -> dict[str, Any]:
    """One round: the same files to each receiver in turn; objects/s of each."""
    work.mkdir(parents=True, exist_ok=True)
    n = len(files)
    out: dict[str, Any] = {}

    warm = warm_up_files(work, "receivers")
    k = len(warm)
    bare_cpu: dict[str, float] = {}
    out["pynetdicom_storescp"] = _bare_receiver(
        pynetdicom_storescp, work, "pyn", files, warm, cpu=bare_cpu
    )
    out["pynetdicom_durable"] = _bare_receiver(
        functools.partial(pynetdicom_storescp, durable=True), work, "pyn-durable", files, warm
    )
    out["dcmtk_storescp"] = _bare_receiver(dcmtk_storescp, work, "dcmtk", files, warm)

    pacs_port = free_port()
    pacs_dir = work / "pacs-throughput"
    with (
        pacs_storescp(pacs_dir, pacs_port, work / "pacs-throughput.log"),
        Node(work, pacs_port, workers=workers, name="node-throughput") as node,
    ):
        warm_up(node.port, NODE_AE, warm, lambda: node.settled() >= k)
        assert node.proc is not None
        pids = [node.proc.pid, *_descendants(node.proc.pid)]
        cpu0 = {pid: _cpu_seconds(pid) for pid in pids}
        pacs = [p for p in _descendants(os.getpid()) if str(pacs_dir).encode() in (_args(p) or [])]
        pacs0 = sum(_cpu_seconds(p) for p in pacs)
        t0 = time.perf_counter()
        t_ack = run_storescu(node.port, NODE_AE, files)
        wait_for(lambda: node.settled() >= k + n, 60 + n * 2, interval=0.05)
        t_all = time.perf_counter() - t0
        cpu: dict[str, float] = {}
        for pid in pids:  # CPU ms per study of each role over the timed load
            role = _role_of(pid)
            cpu[role] = cpu.get(role, 0.0) + (_cpu_seconds(pid) - cpu0[pid]) * 1000 / n
        pacs_ms = (sum(_cpu_seconds(p) for p in pacs) - pacs0) * 1000 / n
        delivered = count_files(pacs_dir) - k
        failed = node.journal_rows("SELECT COUNT(*) FROM studies WHERE state = 'failed'")[0][0]
    out["cpu_ms_per_study"] = cpu
    out["pacs_cpu_ms_per_result"] = pacs_ms
    out["pynetdicom_storescp_cpu_ms"] = bare_cpu["pyn"]
    out["diastolic_sr_acknowledged"] = n / t_ack
    out["diastolic_sr_end_to_end"] = n / t_all
    out["diastolic_sr_delivered"] = delivered
    out["diastolic_sr_failed"] = failed
    out["ratio_to_pynetdicom"] = out["diastolic_sr_end_to_end"] / out["pynetdicom_storescp"]
    out["ratio_to_dcmtk"] = out["diastolic_sr_end_to_end"] / out["dcmtk_storescp"]
    out["ratio_to_durable"] = out["diastolic_sr_end_to_end"] / out["pynetdicom_durable"]
    out["durable_to_pynetdicom"] = out["pynetdicom_durable"] / out["pynetdicom_storescp"]
    return out


def _bare_receiver(
    server: Callable[..., Any],
    work: Path,
    tag: str,
    files: Sequence[Path],
    warm: Sequence[Path],
    cpu: dict[str, float] | None = None,
) -> float:
    """objects/s of a bare storescp (pynetdicom's or DCMTK's, writing to disk) under the load,
    after the same warm-up as the node's.  With ``cpu``, its CPU per object (ms, every process
    the server started, from /proc) goes there under ``tag``."""
    port, n, k = free_port(), len(files), len(warm)
    before = set(_descendants(os.getpid()))
    with server(work / f"{tag}-out", port, work / f"{tag}-storescp.log", ae="BASE") as folder:
        warm_up(port, "BASE", warm, lambda: count_files(folder) >= k)
        pids = [p for p in _descendants(os.getpid()) if p not in before]
        cpu0 = {p: _cpu_seconds(p) for p in pids}
        t = run_storescu(port, "BASE", files)
        wait_for(lambda: count_files(folder) >= k + n, 60)
        if cpu is not None:
            cpu[tag] = sum(_cpu_seconds(p) - cpu0[p] for p in pids) * 1000 / n
    return n / t


def _end_to_end(
    work: Path,
    name: str,
    streams: Sequence[tuple[Node, Sequence[Path]]],
    n: int,
    pacs_dir: Path,
) -> dict[str, Any]:
    """Send each stream's files to its node (one storescu per stream, all at once); objects/s
    acknowledged (the slowest stream) and end to end (until every study of every node is
    delivered or failed).  Each node takes warm-up studies of its own first (not timed)."""
    nodes = list({id(node): node for node, _ in streams}.values())
    # one journal (several nodes on one database): each node's count is the whole count
    shared = (
        len(nodes) > 1 and nodes[0].journal_url and nodes[0].journal_url == nodes[1].journal_url
    )
    counted = nodes[:1] if shared else nodes
    for i, node in enumerate(nodes):
        warm = warm_up_files(work, f"{name}-{i}")
        want = (i + 1) * len(warm)
        warm_up(node.port, NODE_AE, warm, lambda w=want: sum(x.settled() for x in counted) >= w)
    base = sum(node.settled() for node in counted)
    pacs_base = count_files(pacs_dir)
    t0 = time.perf_counter()
    procs = [
        subprocess.Popen(
            storescu_cmd(node.port, NODE_AE, files),
            env=storescu_env(),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        for node, files in streams
    ]
    for p in procs:
        _, err = p.communicate(timeout=3600)
        if p.returncode != 0:
            raise RuntimeError(f"storescu failed ({p.returncode}) in {name}: {err[-2000:]}")
    t_ack = time.perf_counter() - t0
    wait_for(
        lambda: sum(node.settled() for node in counted) >= base + n, 120 + n * 2, interval=0.05
    )
    t_all = time.perf_counter() - t0
    failed = sum(
        node.journal_rows("SELECT COUNT(*) FROM studies WHERE state = 'failed'")[0][0]
        for node in counted
    )
    return {
        "acknowledged": n / t_ack,
        "end_to_end": n / t_all,
        "delivered": count_files(pacs_dir) - pacs_base,
        "failed": failed,
    }


@contextlib.contextmanager
def postgres(work: Path) -> Iterator[Any]:
    """A PostgreSQL server for the bench (tests/pgutil.py: Debian postgresql on a free
    loopback port, as the postgres user), stopped afterwards."""
    from pgutil import running_server

    with running_server(free_port()) as server:
        yield server


def bench_journals(work: Path, n: int, workers: int | None, rounds: int, pg: Any) -> dict[str, Any]:
    """One node end to end on the SQLite journal and on a PostgreSQL journal (a fresh database
    each round), the same load, taking turns with pynetdicom's storescp within each round."""
    from pgutil import NODE_PASSWORD

    say(f"\n== journals: one node, SQLite against PostgreSQL, {n} studies, {rounds} round(s) ==")
    files = write_studies(work / "journals-load", n, run="journals")
    per_round = []
    for i in range(rounds):
        w = work / f"journals{i + 1}"
        w.mkdir(parents=True)
        r: dict[str, Any] = {}
        warm = warm_up_files(w, "pyn")
        r["pynetdicom_storescp"] = _bare_receiver(pynetdicom_storescp, w, "pyn", files, warm)
        for name in ("sqlite", "postgresql"):
            pacs_port, pacs_dir = free_port(), w / f"pacs-{name}"
            url = pg.url(pg.create_database()) if name == "postgresql" else ""
            with (
                pacs_storescp(pacs_dir, pacs_port, w / f"pacs-{name}.log"),
                Node(
                    w,
                    pacs_port,
                    workers=workers,
                    name=f"node-{name}",
                    journal=url,
                    pg_password=NODE_PASSWORD,
                ) as node,
            ):
                r[name] = _end_to_end(w, name, [(node, files)], n, pacs_dir)
        r["ratio_postgresql_to_sqlite"] = r["postgresql"]["end_to_end"] / r["sqlite"]["end_to_end"]
        say(
            f"round {i + 1}: pynetdicom storescp {r['pynetdicom_storescp']:.1f}/s; end to end "
            f"SQLite {r['sqlite']['end_to_end']:.1f}/s "
            f"({r['sqlite']['end_to_end'] / r['pynetdicom_storescp']:.2f} x), PostgreSQL "
            f"{r['postgresql']['end_to_end']:.1f}/s "
            f"({r['postgresql']['end_to_end'] / r['pynetdicom_storescp']:.2f} x); "
            f"acknowledged {r['sqlite']['acknowledged']:.1f} / "
            f"{r['postgresql']['acknowledged']:.1f}"
        )
        per_round.append(r)
    out: dict[str, Any] = {"n": n, "workers": workers, "rounds": per_round}
    out["sqlite_end_to_end"] = statistics.median(r["sqlite"]["end_to_end"] for r in per_round)
    out["postgresql_end_to_end"] = statistics.median(
        r["postgresql"]["end_to_end"] for r in per_round
    )
    out["ratio_postgresql_to_sqlite"] = statistics.median(
        r["ratio_postgresql_to_sqlite"] for r in per_round
    )
    out["delivered"] = min(
        min(r["sqlite"]["delivered"], r["postgresql"]["delivered"]) for r in per_round
    )
    say(
        f"median: SQLite {out['sqlite_end_to_end']:.1f}/s, PostgreSQL "
        f"{out['postgresql_end_to_end']:.1f}/s, PostgreSQL / SQLite "
        f"{out['ratio_postgresql_to_sqlite']:.2f}"
    )
    return out


def bench_nodes(work: Path, n: int, rounds: int, pg: Any) -> dict[str, Any]:
    """Two nodes on one PostgreSQL journal against one node, each with one grading process,
    under the same load: two storescu streams of n/2 studies at once, both to the one node, or
    one to each node (as a TCP balancer would spread them).  Twice: with every process free to
    run on both cores, and with each node held to a core of its own (``sched_setaffinity``,
    inherited by its processes; PostgreSQL, ``storescu`` and the PACS on either core), which
    stands for two machines each with one core: the one node then has one core, two nodes two."""
    from pgutil import NODE_PASSWORD

    say(
        f"\n== nodes: two nodes on one PostgreSQL against one node, one grading process per "
        f"node, {n} studies in two streams, {rounds} round(s) =="
    )
    files = write_studies(work / "nodes-load", n, run="nodes")
    halves = [files[::2], files[1::2]]
    cores = sorted(os.sched_getaffinity(0))
    pinnable = len(cores) >= 2
    out: dict[str, Any] = {"n": n}
    for placement in ("shared", "core_each") if pinnable else ("shared",):
        per_round = []
        say(
            "-- every process on any core"
            if placement == "shared"
            else f"-- each node held to a core of its own (cores {cores[0]} and {cores[1]})"
        )
        for i in range(rounds):
            w = work / f"nodes-{placement}{i + 1}"
            w.mkdir(parents=True)
            r: dict[str, Any] = {}
            for setup in ("one", "two"):
                pacs_port, pacs_dir = free_port(), w / f"pacs-{setup}"
                url = pg.url(pg.create_database())
                with contextlib.ExitStack() as stack:
                    stack.enter_context(pacs_storescp(pacs_dir, pacs_port, w / f"pacs-{setup}.log"))
                    nodes = [
                        stack.enter_context(
                            Node(
                                w,
                                pacs_port,
                                workers=1,
                                spare_workers=0,  # one grading process per node
                                name=f"{setup}-{k}",
                                journal=url,
                                pg_password=NODE_PASSWORD,
                                cpus=None if placement == "shared" else {cores[k]},
                            )
                        )
                        for k in range(1 if setup == "one" else 2)
                    ]
                    streams = [(nodes[k % len(nodes)], halves[k]) for k in range(2)]
                    r[setup] = _end_to_end(w, setup, streams, n, pacs_dir)
            r["ratio_two_to_one"] = r["two"]["end_to_end"] / r["one"]["end_to_end"]
            say(
                f"round {i + 1}: one node {r['one']['end_to_end']:.1f}/s, two nodes "
                f"{r['two']['end_to_end']:.1f}/s: {r['ratio_two_to_one']:.2f} x "
                f"(acknowledged {r['one']['acknowledged']:.1f} / {r['two']['acknowledged']:.1f})"
            )
            per_round.append(r)
        fig: dict[str, Any] = {"rounds": per_round}
        fig["one_node"] = statistics.median(r["one"]["end_to_end"] for r in per_round)
        fig["two_nodes"] = statistics.median(r["two"]["end_to_end"] for r in per_round)
        fig["ratio_two_to_one"] = statistics.median(r["ratio_two_to_one"] for r in per_round)
        fig["delivered"] = min(min(r["one"]["delivered"], r["two"]["delivered"]) for r in per_round)
        say(
            f"median ({'any core' if placement == 'shared' else 'a core per node'}): one node "
            f"{fig['one_node']:.1f}/s, two nodes {fig['two_nodes']:.1f}/s, two / one "
            f"{fig['ratio_two_to_one']:.2f}   (target >= 1.6)"
        )
        out[placement] = fig
    # the figures of the shared placement stay where they were (JSON readers)
    out.update(out["shared"])
    return out


def bench_latency(work: Path, n: int, rate: float, workers: int | None) -> dict[str, Any]:
    work.mkdir(parents=True, exist_ok=True)
    say(f"\n== latency: {n} studies offered at {rate:g} studies/s (one storescu per study) ==")
    files = write_studies(work / "latency-load", n, run="latency")
    pacs_port = free_port()
    with (
        pacs_storescp(work / "pacs-latency", pacs_port, work / "pacs-latency.log"),
        Node(work, pacs_port, workers=workers, name="node-latency") as node,
    ):
        # a node in service is warm: the same warm-up as the receivers section, not counted
        warm = warm_up_files(work, "latency")
        warm_up(node.port, NODE_AE, warm, lambda: node.settled() >= len(warm))
        since = time.time()
        procs = []
        t0 = time.perf_counter()
        for i, f in enumerate(files):
            delay = t0 + i / rate - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
            procs.append(
                subprocess.Popen(
                    storescu_cmd(node.port, NODE_AE, [f]),
                    env=storescu_env(),
                    stdout=subprocess.DEVNULL,
                    stderr=subprocess.DEVNULL,
                )
            )
        offered = n / (time.perf_counter() - t0)
        bad = sum(1 for p in procs if p.wait(300) != 0)  # e.g. refused: associations full
        wait_for(lambda: node.settled() >= len(warm) + n - bad, 60 + 2 * n, interval=0.05)
        rows = node.journal_rows(
            """SELECT d.delivered_at - o.received_at FROM deliveries d
               JOIN results r ON r.result_uid = d.result_uid
               JOIN objects o ON o.study_uid = r.study_uid
               WHERE d.state = 'delivered' AND o.received_at >= ?""",
            (since,),
        )
    lat = [r[0] * 1000 for r in rows]
    out = {
        "n": n,
        "offered_per_s": offered,
        "storescu_failures": bad,
        "delivered": len(lat),
        "p50_ms": percentile(lat, 50),
        "p95_ms": percentile(lat, 95),
        "p99_ms": percentile(lat, 99),
        "max_ms": max(lat) if lat else float("nan"),
    }
    say(
        f"offered {offered:.1f} studies/s; {bad} storescu runs failed; {len(lat)} delivered; "
        "receipt -> delivered: "
        f"p50 {out['p50_ms']:.0f} ms, p95 {out['p95_ms']:.0f} ms, p99 {out['p99_ms']:.0f} ms, "
        f"max {out['max_ms']:.0f} ms   (target p95 < 250 ms)"
    )
    return out


def bench_offline(work: Path, n: int) -> dict[str, Any]:
    import pydicom

    from service.cli import main

    say(f"\n== offline: grade a folder of {n} files vs bare pydicom read+write ==")
    src = work / "offline-in"
    write_studies(src, n, run="offline")
    files = sorted(src.iterdir())
    bare_out = work / "offline-bare"
    bare_out.mkdir()
    # warm both paths once (imports, code tables), outside the timing
    warm = work / "offline-warm"
    warm.mkdir()
    shutil.copy(files[0], warm / files[0].name)
    with contextlib.redirect_stdout(io.StringIO()):
        main(["grade", str(warm), "--out", str(work / "offline-warm-out"), "--json"])
    t0 = time.perf_counter()
    for f in files:
        ds = pydicom.dcmread(f)
        ds.save_as(bare_out / f.name, enforce_file_format=True)
    t_bare = time.perf_counter() - t0
    t0 = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):
        code = main(["grade", str(src), "--out", str(work / "offline-out"), "--json"])
    t_grade = time.perf_counter() - t0
    out = {
        "n": n,
        "bare_pydicom_files_per_s": n / t_bare,
        "grade_files_per_s": n / t_grade,
        "grade_exit": code,
        "ratio": t_bare / t_grade,
    }
    say(f"bare pydicom read+write:  {n / t_bare:8.1f} files/s")
    say(f"diastolic-sr grade --out: {n / t_grade:8.1f} files/s (exit {code})")
    say(f"ratio grade / bare: {out['ratio']:.2f}   (target >= 0.5)")
    return out


def bench_summary(work: Path, n: int, rounds: int) -> dict[str, Any]:
    """``grade --pdf --out`` against ``grade --out`` on the same files, each as a separate
    command (process start, imports, worker processes: what a user runs), taken in turn for
    ``rounds`` rounds; medians.  Target: with summaries at least 0.5 x the speed without."""
    say(f"\n== summary: grade --pdf --out vs grade --out, {n} files, {rounds} rounds ==")
    src = work / "summary-in"
    write_studies(src, n, run="summary")
    cli = [sys.executable, "-m", "service.cli", "grade", str(src), "--json"]
    times: dict[str, list[float]] = {"plain": [], "pdf": []}
    cpu: dict[str, list[float]] = {"plain": [], "pdf": []}
    for r in range(rounds):
        for kind, extra in (("plain", []), ("pdf", ["--pdf"])):
            out = work / f"summary-out-{kind}-{r}"
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            t0 = time.perf_counter()
            done = subprocess.run(
                [*cli, "--out", str(out), *extra],
                stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE,
                cwd=REPO,
                timeout=1800,
            )
            times[kind].append(time.perf_counter() - t0)
            after = resource.getrusage(resource.RUSAGE_CHILDREN)  # the command and its workers
            cpu[kind].append(after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime)
            if done.returncode not in (0, 1):
                raise RuntimeError(done.stderr.decode(errors="replace")[-2000:])
            shutil.rmtree(out, ignore_errors=True)
        ratio = times["plain"][-1] / times["pdf"][-1]
        cpu_ratio = cpu["plain"][-1] / cpu["pdf"][-1]
        say(
            f"round {r + 1}: grade --out {n / times['plain'][-1]:7.1f} files/s, "
            f"grade --pdf --out {n / times['pdf'][-1]:7.1f} files/s, ratio {ratio:.2f}; "
            f"CPU {cpu['plain'][-1]:.1f} s vs {cpu['pdf'][-1]:.1f} s, ratio {cpu_ratio:.2f}"
        )
    plain, pdf = statistics.median(times["plain"]), statistics.median(times["pdf"])
    ratios = [a / b for a, b in zip(times["plain"], times["pdf"], strict=True)]
    out = {
        "n": n,
        "rounds": rounds,
        "plain_s": times["plain"],
        "pdf_s": times["pdf"],
        "plain_files_per_s": n / plain,
        "pdf_files_per_s": n / pdf,
        "ratio_median": statistics.median(ratios),
        "ratios": ratios,
        "plain_cpu_s": cpu["plain"],
        "pdf_cpu_s": cpu["pdf"],
        "cpu_ratio_median": statistics.median(
            a / b for a, b in zip(cpu["plain"], cpu["pdf"], strict=True)
        ),
    }
    say(
        f"median: grade --out {n / plain:.1f} files/s, grade --pdf --out {n / pdf:.1f} files/s; "
        f"ratio {out['ratio_median']:.2f}   (target >= 0.5); CPU-time ratio "
        f"{out['cpu_ratio_median']:.2f} (the same comparison, less sensitive to other load)"
    )
    return out


def bench_sender(work: Path, n: int) -> dict[str, Any]:
    """The node's C-STORE sending (service/network/store_scu.py: pynetdicom's requestor with a
    watchdog, each stored result sent as encoded where the PACS accepts it) against
    pynetdicom's requestor sending the files as encoded (``send_c_store`` of a path with
    ``STORE_SEND_CHUNKED_DATASET``, TCP_NODELAY set), each sending the same N result SRs to
    DCMTK storescp over one association; objects/s and this process's CPU per object (all
    its threads)."""
    from pydicom.uid import ExplicitVRLittleEndian
    from pynetdicom import AE, _config

    from service.network.grading_worker import GradeJob, grade_in_worker
    from service.network.store_scu import StoreSession, Timeouts
    from service.observability.logs import quiet_pynetdicom
    from service.pipeline import GradeOptions
    from service.sr.read import file_meta_uids

    say(f"\n== sender: {n} result SRs to DCMTK storescp over one association ==")
    src = write_studies(work / "sender-in", n, run="sender")
    results = work / "sender-results"
    results.mkdir()
    files = []
    for i, path in enumerate(src):
        job = GradeJob(
            study_uid=f"sender-{i}",
            object_uids=(f"o{i}",),
            objects=(path.read_bytes(),),
            options=GradeOptions(),
            mapping_paths=(),
        )
        record = grade_in_worker(job)
        if record.result is not None and record.result.data is not None:
            files.append(results / f"r{i:06d}.dcm")
            files[-1].write_bytes(record.result.data)
    sizes = [f.stat().st_size for f in files]
    say(f"{len(files)} results, median {statistics.median(sizes) / 1024:.0f} KiB")
    quiet_pynetdicom()

    sop_class = file_meta_uids(files[0].read_bytes())["MediaStorageSOPClassUID"]

    def ours(port: int) -> None:
        session = StoreSession.open(
            LOOPBACK,
            port,
            calling_ae=NODE_AE,
            called_ae=PACS_AE,
            sop_classes=[sop_class],
            max_pdu=16382,
            timeouts=Timeouts(connect=10, acse=30, dimse=60, network=60),
        )
        for f in files:
            assert session.store(f.read_bytes()).status == 0
        session.release()

    def theirs(port: int) -> None:
        from service.network.listener import no_delay

        ae = AE(ae_title=NODE_AE)
        ae.add_requested_context(sop_class, ExplicitVRLittleEndian)
        assoc = ae.associate(LOOPBACK, port, ae_title=PACS_AE)
        no_delay(assoc)
        before, _config.STORE_SEND_CHUNKED_DATASET = _config.STORE_SEND_CHUNKED_DATASET, True
        try:
            for f in files:
                assert assoc.send_c_store(f).Status == 0
        finally:
            _config.STORE_SEND_CHUNKED_DATASET = before
            assoc.release()

    out: dict[str, Any] = {"n": len(files), "median_bytes": statistics.median(sizes)}
    for name, send in (("store_scu", ours), ("pynetdicom_file", theirs)):
        port = free_port()
        with pacs_storescp(work / f"sender-pacs-{name}", port, work / f"sender-{name}.log"):
            c0, t0 = time.process_time(), time.perf_counter()
            send(port)
            cpu, wall = time.process_time() - c0, time.perf_counter() - t0
        per_s, cpu_ms = len(files) / wall, cpu * 1000 / len(files)
        out[name] = {"objects_per_s": per_s, "cpu_ms_per_object": cpu_ms}
        say(
            f"{name + ':':20s} {per_s:7.1f} objects/s, "
            f"{cpu_ms:5.2f} ms CPU per object (this process, all threads)"
        )
    return out


def bench_memory(
    work: Path, marks: Sequence[int], workers: int | None, batch: int
) -> dict[str, Any]:
    total = max(marks)
    say(f"\n== memory: node RSS while {total} studies stream through ==")
    pacs_port = free_port()
    out: dict[str, Any] = {"marks": {}}
    with (
        pacs_storescp(work / "pacs-memory", pacs_port, work / "pacs-memory.log"),
        Node(work, pacs_port, workers=workers, name="node-memory") as node,
    ):
        rss0, _ = node.rss_kib()
        tree0 = node.tree_rss_kib()
        out["rss_start_kib"] = rss0
        out["tree_rss_start_kib"] = tree0
        say(
            f"after start:           RSS {rss0 / 1024:7.1f} MiB "
            f"(with its grading processes {tree0 / 1024:.1f} MiB)"
        )
        sent = 0
        t0 = time.perf_counter()
        folder = work / "memory-load"
        for mark in sorted(marks):
            while sent < mark:
                k = min(batch, mark - sent)
                if folder.exists():
                    shutil.rmtree(folder)
                files = write_studies(folder, k, start=sent, run="memory")
                run_storescu(node.port, NODE_AE, files)
                sent += k
            wait_for(lambda m=mark: node.settled() >= m, 120 + mark, interval=0.2)
            rss, hwm = node.rss_kib()
            tree = node.tree_rss_kib()
            out["marks"][mark] = {"rss_kib": rss, "hwm_kib": hwm, "tree_rss_kib": tree}
            say(
                f"after {mark:6d} studies: RSS {rss / 1024:7.1f} MiB (peak {hwm / 1024:.1f} MiB), "
                f"with its grading processes {tree / 1024:.1f} MiB, "
                f"{mark / (time.perf_counter() - t0):.1f} studies/s so far"
            )
            # the PACS folder can grow large: keep disk use bounded
            shutil.rmtree(work / "pacs-memory", ignore_errors=True)
            (work / "pacs-memory").mkdir(exist_ok=True)
    return out


def bench_journal(work: Path, sizes: Sequence[int], repeats: int = 30) -> dict[str, Any]:
    from service.store.sqlite_journal import SqliteJournal

    say(f"\n== journal: query times as it grows ({', '.join(map(str, sizes))} studies) ==")
    path = work / "journal-bench.sqlite3"
    j = SqliteJournal(path)
    statements: dict[str, str] = {}

    def trace(sql: str) -> None:
        key = " ".join(sql.split())
        if key.split(" ", 1)[0].upper() in ("SELECT", "UPDATE", "INSERT", "DELETE"):
            statements.setdefault(_shape(key), key)

    j._db.set_trace_callback(trace)  # capture every statement the service runs
    out: dict[str, Any] = {"sizes": {}}
    have = 0
    for size in sorted(sizes):
        _fill(j, have, size)
        have = size
        timings: dict[str, list[float]] = {}

        def timed(name: str, fn: Callable[[], Any], timings: dict = timings) -> Any:
            t = time.perf_counter()
            r = fn()
            timings.setdefault(name, []).append((time.perf_counter() - t) * 1000)
            return r

        for k in range(repeats):
            uid = f"2.25.9{size}{k}"
            timed(
                "store_object",
                lambda uid=uid: j.store_object(
                    sop_instance_uid=uid + ".1",
                    study_uid=uid,
                    sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
                    transfer_syntax="1.2.840.10008.1.2.1",
                    calling_ae="SCANNER1",
                    data=b"object",
                    settle_seconds=0,
                    now=time.time() - 1,
                ),
            )
            timed("next_due_at", j.next_due_at)
            claims = timed("claim_due", lambda: j.claim_due(limit=1))
            if claims:
                from service.store.journal import NewResult

                res = NewResult(
                    result_uid=uid + ".9",
                    series_uid=uid + ".8",
                    sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
                    data=b"result",
                    status="graded",
                    guideline="ase-eacvi-2016",
                    grade="normal",
                    filling_pressure="normal",
                    sources=(uid + ".1",),
                    predecessors=(),
                )
                timed(
                    "finish_grading",
                    lambda c=claims[0], res=res: j.finish_grading(
                        c, result=res, destinations=[("PACS", "PACS@127.0.0.1:1")]
                    ),
                )
            due = timed("due_deliveries", j.due_deliveries)
            timed("next_delivery_at", j.next_delivery_at)
            for d in due:
                timed("mark_delivered", lambda d=d: j.mark_delivered(d.id))
            timed("pending_work", j.pending_work)
        timed("counts (start/stop, queue)", j.counts)
        timed("studies (queue)", lambda: j.studies(states=("failed",)))
        timed("objects_set_aside (queue)", j.objects_set_aside)
        med = {name: statistics.median(v) for name, v in timings.items()}
        out["sizes"][size] = med
        say(f"{size:>8d} studies: " + ", ".join(f"{k} {v:.2f} ms" for k, v in med.items()))
    j._db.set_trace_callback(None)
    plans: dict[str, list[str]] = {}
    db = sqlite3.connect(path)
    for key, sql in sorted(statements.items()):
        try:
            rows = db.execute("EXPLAIN QUERY PLAN " + sql).fetchall()
        except sqlite3.Error as exc:
            plans[key] = [f"(cannot explain: {exc})"]
            continue
        plans[key] = [r[-1] for r in rows]
    db.close()
    j.close()
    say("\nquery plans (SCAN = reads the whole table; SEARCH ... USING INDEX = indexed):")
    for key, plan in plans.items():
        flag = "  SCAN" if any(p.startswith("SCAN") for p in plan) else "  ok  "
        say(f"{flag} {key[:110]}")
        for p in plan:
            say(f"         {p}")
    out["plans"] = plans
    return out


def _shape(sql: str) -> str:
    """A statement with its literal values blanked (one entry per statement shape)."""
    import re

    sql = re.sub(r"'[^']*'", "?", sql)
    sql = re.sub(r"\b\d+(\.\d+)?(e[+-]?\d+)?\b", "?", sql)
    return sql


def _fill(j: Any, start: int, stop: int) -> None:
    """Add delivered studies ``start``..``stop`` straight into the tables (one transaction):
    history as a long-running node accumulates it."""
    now = time.time() - 86400
    db = j._db
    tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    companions = "companions" in tables
    with j._lock:
        db.execute("BEGIN")
        for i in range(start, stop):
            study = f"2.25.1{i:09d}"
            sop = study + ".1"
            res = study + ".9"
            t = now + i * 0.01
            db.execute(
                "INSERT INTO objects (sop_instance_uid, study_uid, sop_class_uid, "
                "transfer_syntax, calling_ae, path, state, received_at) "
                "VALUES (?, ?, '1.2.840.10008.5.1.4.1.1.88.33', '1.2.840.10008.1.2.1', "
                "'SCANNER1', '/x', 'graded', ?)",
                (sop, study, t),
            )
            db.execute(
                "INSERT INTO studies (study_uid, calling_ae, state, first_received_at, "
                "last_received_at, due_at, result_uid, updated_at) "
                "VALUES (?, 'SCANNER1', 'delivered', ?, ?, ?, ?, ?)",
                (study, t, t, t, res, t),
            )
            db.execute(
                "INSERT INTO results (result_uid, study_uid, series_uid, sop_class_uid, path, "
                "status, sources, predecessors, created_at) VALUES (?, ?, ?, "
                "'1.2.840.10008.5.1.4.1.1.88.33', '/x', 'graded', '[]', '[]', ?)",
                (res, study, study + ".8", t),
            )
            db.execute(
                "INSERT INTO deliveries (result_uid, destination, target, state, attempts, "
                "next_attempt_at, created_at, updated_at, delivered_at) "
                "VALUES (?, 'PACS', 'PACS@127.0.0.1:1', 'delivered', 1, ?, ?, ?, ?)",
                (res, t, t, t, t),
            )
            if companions:  # a summary PDF delivered with each result
                db.execute("INSERT INTO companions VALUES (?, ?)", (res, study + ".7"))
        db.execute("COMMIT")


# ---------------------------------------------------------------------------------------------


def parse(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--n", type=int, default=300, help="studies for throughput (default 300)")
    p.add_argument("--offline-n", type=int, help="files for the offline section (default --n)")
    p.add_argument("--latency-n", type=int, default=100, help="studies in the latency run")
    p.add_argument(
        "--summary-n", type=int, default=500, help="files for the summary section (default 500)"
    )
    p.add_argument(
        "--rate", default="10", help="offered studies/s for the latency run(s), e.g. 10,2"
    )
    p.add_argument(
        "--workers",
        type=int,
        help="node grading processes (default: the node's own, one per core but one)",
    )
    p.add_argument(
        "--spare-workers",
        type=int,
        help="node grading processes on idle CPU time only (default: the node's own, one)",
    )
    p.add_argument(
        "--rounds",
        type=int,
        default=3,
        help="rounds of the receivers section, each receiver in turn (default 3; medians)",
    )
    p.add_argument(
        "--memory-at",
        default="1000,10000",
        help="studies streamed at which RSS is read (default 1000,10000)",
    )
    p.add_argument("--memory-batch", type=int, default=500, help="studies per association")
    p.add_argument("--journal-sizes", default="1000,10000,100000", help="journal sizes (studies)")
    p.add_argument(
        "--sections",
        default="receivers,journals,nodes,latency,offline,summary,sender,journal",
        help=f"comma-separated, from {','.join(SECTIONS)} (memory is long: ask for it)",
    )
    p.add_argument(
        "--pacs-parses",
        action="store_true",
        help="the DCMTK storescp acting as the node's PACS parses each result and writes it "
        "again (its default) instead of writing it as received (+B)",
    )
    p.add_argument("--json", type=Path, help="write the figures to this JSON file")
    p.add_argument("--keep", action="store_true", help="keep the work folder")
    p.add_argument("--work", type=Path, help="work folder (default: a new temporary one)")
    return p.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse(argv)
    global PACS_AS_RECEIVED, SPARE_WORKERS
    PACS_AS_RECEIVED = not args.pacs_parses
    SPARE_WORKERS = args.spare_workers
    sections = [s.strip() for s in args.sections.split(",") if s.strip()]
    unknown = set(sections) - set(SECTIONS)
    if unknown:
        print(f"unknown section(s): {', '.join(sorted(unknown))}", file=sys.stderr)
        return 2
    for tool in (STORESCU, STORESCP, ECHOSCU):
        if not os.access(tool, os.X_OK) and set(sections) - {"offline", "summary", "journal"}:
            print(f"{tool} missing (Debian package dcmtk)", file=sys.stderr)
            return 2
    work = args.work or Path(tempfile.mkdtemp(prefix="diastolic-sr-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    say(f"diastolic-sr benchmarks; {os.cpu_count()} CPUs; work folder {work}")
    figures: dict[str, Any] = {}
    stack = contextlib.ExitStack()
    try:
        if "receivers" in sections:
            figures["receivers"] = bench_receivers(work, args.n, args.workers, args.rounds)
        if {"journals", "nodes"} & set(sections):
            pg = stack.enter_context(postgres(work))
            if "journals" in sections:
                figures["journals"] = bench_journals(work, args.n, args.workers, args.rounds, pg)
            if "nodes" in sections:
                figures["nodes"] = bench_nodes(work, args.n, args.rounds, pg)
        if "latency" in sections:
            rates = [float(x) for x in str(args.rate).split(",") if x.strip()]
            for i, rate in enumerate(rates):
                key = "latency" if i == 0 else f"latency_at_{rate:g}"
                figures[key] = bench_latency(work / f"lat{i}", args.latency_n, rate, args.workers)
        if "offline" in sections:
            figures["offline"] = bench_offline(work, args.offline_n or args.n)
        if "summary" in sections:
            figures["summary"] = bench_summary(work, args.summary_n, args.rounds)
        if "sender" in sections:
            figures["sender"] = bench_sender(work, args.n)
        if "memory" in sections:
            marks = [int(x) for x in args.memory_at.split(",") if x.strip()]
            figures["memory"] = bench_memory(work, marks, args.workers, args.memory_batch)
        if "journal" in sections:
            sizes = [int(x) for x in args.journal_sizes.split(",") if x.strip()]
            figures["journal"] = bench_journal(work, sizes)
    finally:
        stack.close()
        if args.json:
            args.json.write_text(json.dumps(figures, indent=2, default=str))
        if not args.keep and args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
