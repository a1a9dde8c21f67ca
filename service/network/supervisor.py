"""``serve``'s supervisor: the node as processes, one per role, that share nothing but the
journal (and, on SQLite, the spool beside it).

* the **receiver** (pynetdicom listener: store durably, journal, acknowledge);
* ``assembly.workers`` **graders** (each claims settled studies and grades them);
* the **sender** (one worker per destination; claims due deliveries).

The supervisor holds the data directory's lock, gives back the claims of the node's earlier
run, writes the configuration the roles run on (``run/config.json``), starts the roles
(:mod:`service.network.roles`) and watches them: a role process that ends when it should not
is logged (``process_ended``: its exit status or signal), its claims are given back at once
(a study counts the claim towards its limit, so a study whose grading keeps killing its
process fails with that reason) and it is started again (``process_restarted``), after a
back-off when it keeps failing.  SIGTERM and SIGHUP reach every role: the supervisor checks a
new configuration first and refuses a bad one; SIGTERM stops the roles (the receiver after its
open associations), then the supervisor.  It serves ``/healthz`` (with each role's process) and
``/metrics`` (the roles' counters summed) and runs the retention purge.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from typing import Any

from service.config import Config
from service.errors import UserError
from service.network.roles import receiver_status_path, write_run_config
from service.network.service import NodeBase, effective_reload, owner_name
from service.observability.logs import event
from service.observability.metrics import Metrics

log = logging.getLogger("diastolic_sr.supervisor")

#: seconds the receiver has to report its port at start
START_TIMEOUT = 60.0
#: a role that ran at least this long before it ended is restarted at once
STABLE_SECONDS = 30.0
#: longest wait before restarting a role that keeps failing
MAX_RESTART_DELAY = 30.0


@dataclass
class RoleProcess:
    role: str  # receiver, grader, sender
    name: str  # receiver, grader-1, ..., grader-spare-1, ..., sender
    #: a grader that grades only on otherwise idle CPU time (``assembly.spare_workers``)
    spare: bool = False
    proc: subprocess.Popen[bytes] | None = None
    owner: str = ""
    started_at: float = 0.0
    restarts: int = 0
    #: consecutive quick failures (for the restart back-off)
    failures: int = 0
    restart_at: float | None = None
    info: dict[str, Any] = field(default_factory=dict)

    @property
    def pid(self) -> int | None:
        return None if self.proc is None else self.proc.pid

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None


class Supervisor(NodeBase):
    def __init__(
        self,
        config: Config,
        *,
        lease_seconds: float | None = None,
        poll_seconds: float = 0.5,
        log_level: str | None = None,
        log_format: str | None = None,
    ) -> None:
        if lease_seconds is not None:
            config = config.model_copy(
                update={
                    "journal": config.journal.model_copy(update={"lease_seconds": lease_seconds})
                }
            )
        super().__init__(config)
        self.run_dir = self.data_dir / "run"
        self.metrics_dir = self.run_dir / "metrics"
        try:
            self.metrics_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"cannot create data directory {self.data_dir}: {exc}") from None
        self.metrics = Metrics.collecting(self.metrics_dir)
        self._poll = poll_seconds
        self._log_level = log_level
        self._log_format = log_format
        self.roles: list[RoleProcess] = []
        #: the pipe whose writing end only this process holds: roles end when it closes
        self._lifeline: tuple[int, int] | None = None

    # -- start ----------------------------------------------------------------------------------

    def start(self) -> int:
        """Lock the data directory, recover the journal, start the roles; returns the port."""
        self._lock_data_dir()
        try:
            self._open_journal()
            shutil.rmtree(self.metrics_dir, ignore_errors=True)
            self.metrics_dir.mkdir(parents=True, exist_ok=True)
            self._lifeline = os.pipe()
            os.set_inheritable(self._lifeline[0], True)
            receiver = RoleProcess("receiver", "receiver")
            self.roles = [receiver]
            self.roles += [
                RoleProcess("grader", f"grader-{i}")
                for i in range(1, self.config.assembly.workers + 1)
            ]
            self.roles += [
                RoleProcess("grader", f"grader-spare-{i}", spare=True)
                for i in range(1, self.config.assembly.spare_workers + 1)
            ]
            self.roles.append(RoleProcess("sender", "sender"))
            self._write_run_config()
            self._spawn(receiver)
            self.port = self._wait_for_receiver(receiver)
            self._write_run_config()  # with the port it got, for a restarted receiver
            for role in self.roles[1:]:
                self._spawn(role)
        except BaseException:
            self.stop()
            raise
        self._start_services()
        return self.port

    def _spawn(self, role: RoleProcess) -> None:
        assert self._lifeline is not None
        if role.role == "receiver":
            receiver_status_path(self.run_dir).unlink(missing_ok=True)
        env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(self.metrics_dir)}
        if self._log_level:
            env["DIASTOLIC_SR_LOG_LEVEL"] = self._log_level
        if self._log_format:
            env["DIASTOLIC_SR_LOG_FORMAT"] = self._log_format
        role.proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "service.network.roles",
                role.role,
                "--run-dir",
                str(self.run_dir),
                "--node-id",
                self.node_id,
                "--name",
                role.name,
                "--lifeline",
                str(self._lifeline[0]),
                "--poll-seconds",
                str(self._poll),
                *(["--spare"] if role.spare else []),
            ],
            pass_fds=(self._lifeline[0],),
            env=env,
        )
        # the owner names the process: its claims are given back when it ends
        role.owner = owner_name(self.node_id, role.name, role.proc.pid)
        role.started_at = time.monotonic()
        role.restart_at = None

    def _wait_for_receiver(self, receiver: RoleProcess) -> int:
        status = receiver_status_path(self.run_dir)
        deadline = time.monotonic() + START_TIMEOUT
        while time.monotonic() < deadline:
            info: dict[str, Any] = {}
            with contextlib.suppress(OSError, ValueError):
                info = json.loads(status.read_text())
            if info.get("pid") == receiver.pid:
                if "error" in info:
                    raise UserError(str(info["error"]))
                receiver.info = info
                return int(info["port"])
            if not receiver.alive():
                code = receiver.proc.returncode if receiver.proc else None
                raise UserError(f"the receiver process ended at start (exit status {code})")
            time.sleep(0.05)
        raise UserError(f"the receiver process did not start within {START_TIMEOUT:g} s")

    def _write_run_config(self) -> None:
        """The configuration the roles run on: the one in force, listening on the port the
        receiver got when the configured one is 0 (so that a restarted receiver keeps it)."""
        config = self.config
        if config.node.port == 0 and self.port:
            config = config.model_copy(
                update={"node": config.node.model_copy(update={"port": self.port})}
            )
        write_run_config(self.run_dir, config)

    # -- watching -------------------------------------------------------------------------------

    def watch(self) -> None:
        """Restart every role process that ended (call it every fraction of a second)."""
        if self._stopped.is_set():
            return
        now = time.monotonic()
        for role in self.roles:
            if role.proc is None or role.alive():
                if role.proc is None and role.restart_at is not None and now >= role.restart_at:
                    self._restart(role)
                continue
            self._ended(role)
            if role.restart_at is not None and now >= role.restart_at:
                self._restart(role)

    def _ended(self, role: RoleProcess) -> None:
        """A role process ended: say so, give its claims back, plan its restart."""
        assert role.proc is not None
        code = role.proc.returncode
        how = f"signal {signal.Signals(-code).name}" if code < 0 else f"exit status {code}"
        ran = time.monotonic() - role.started_at
        role.failures = 0 if ran >= STABLE_SECONDS else role.failures + 1
        delay = 0.0 if role.failures <= 1 else min(2.0 ** (role.failures - 1), MAX_RESTART_DELAY)
        released = {"studies": 0, "deliveries": 0}
        if self.journal is not None:
            try:
                released = self.journal.release_owner(role.owner)
            except Exception as exc:  # the leases run out instead
                log.error("cannot give back the claims of %s: %s", role.name, exc)
        event(
            "process_ended",
            f"{role.name} process {role.proc.pid} ended unexpectedly ({how}); "
            f"{released['studies']} studies and {released['deliveries']} deliveries it held "
            f"given back; restart in {delay:g} s",
            level=logging.ERROR,
            process_role=role.name,
            pid=role.proc.pid,
            exit=how,
            studies_released=released["studies"],
            deliveries_released=released["deliveries"],
            restart_in_seconds=delay,
        )
        role.proc = None
        role.restart_at = time.monotonic() + delay

    def _restart(self, role: RoleProcess) -> None:
        try:
            self._spawn(role)
            if role.role == "receiver":
                self.port = self._wait_for_receiver(role)
        except Exception as exc:
            log.error("cannot restart %s: %s", role.name, exc)
            if role.proc is not None and role.proc.poll() is None:
                role.proc.kill()
                role.proc.wait(10)
            role.proc = None
            role.failures += 1
            role.restart_at = time.monotonic() + min(
                2.0 ** max(role.failures - 1, 0), MAX_RESTART_DELAY
            )
            return
        role.restarts += 1
        event(
            "process_restarted",
            f"{role.name} process restarted (pid {role.pid}, restart {role.restarts})",
            process_role=role.name,
            pid=role.pid,
            restarts=role.restarts,
        )

    # -- health ---------------------------------------------------------------------------------

    def listener_up(self) -> bool:
        return bool(self.roles) and self.roles[0].alive()

    def extra_checks(self) -> dict[str, dict[str, Any]]:
        return {
            "processes": {
                "ok": all(r.alive() for r in self.roles),
                **{
                    r.name: {"alive": r.alive(), "pid": r.pid, "restarts": r.restarts}
                    for r in self.roles
                },
            }
        }

    # -- reload ---------------------------------------------------------------------------------

    def reload(self, new: Config) -> list[str]:
        effective, kept = effective_reload(self.config, new)
        self.config = effective
        self._write_run_config()
        for role in self.roles:
            if role.alive():
                assert role.proc is not None
                with contextlib.suppress(ProcessLookupError):
                    role.proc.send_signal(signal.SIGHUP)
        from service.observability.logs import set_level

        set_level(self._log_level or effective.logging.level)
        self._stop_retention()
        self._start_retention()
        self._write_status()
        return kept

    # -- stop -------------------------------------------------------------------------------------

    def stop(self) -> None:
        if self._stopped.is_set():
            return
        self._stopped.set()
        log.info("stopping: the roles finish what they hold")
        for role in self.roles:
            if role.alive():
                assert role.proc is not None
                with contextlib.suppress(ProcessLookupError):
                    role.proc.send_signal(signal.SIGTERM)
        grace = self.config.limits.shutdown_grace_seconds + 60
        deadline = time.monotonic() + grace
        for role in self.roles:
            if role.proc is None:
                continue
            try:
                role.proc.wait(max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                log.warning("%s did not stop within %g s; killed", role.name, grace)
                role.proc.kill()
                role.proc.wait(10)
        if self.journal is not None:
            for role in self.roles:
                if role.owner:
                    with contextlib.suppress(Exception):
                        self.journal.release_owner(role.owner)
        if self._lifeline is not None:
            for fd in self._lifeline:
                with contextlib.suppress(OSError):
                    os.close(fd)
            self._lifeline = None
        self._finish_stop()
