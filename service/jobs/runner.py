"""The job runner: seal the log and audit due months on a schedule, in one process.

Each job runs in its own session and transaction; a failure is logged and the job is tried
again at its next time (a database restart does not stop the runner).
"""

from __future__ import annotations

import logging
import time

from sqlalchemy.orm import Session, sessionmaker

from service.jobs.due_audits import DueResult, audit_due
from service.settings import Settings
from service.store.log_upkeep import keep_log
from service.store.signing import Signer

log = logging.getLogger("evenhand.jobs")


class JobRunner:
    def __init__(
        self,
        factory: sessionmaker[Session],
        signer: Signer,
        settings: Settings,
        *,
        seal_every: float,
        audit_every: float,
    ) -> None:
        self.factory = factory
        self.signer = signer
        self.settings = settings
        self.seal_every = seal_every
        self.audit_every = audit_every
        self._next_seal = 0.0
        self._next_audit = 0.0

    def seal(self) -> bool:
        try:
            done = keep_log(
                self.factory,
                self.signer,
                self.settings.timezone,
                mirror=self.settings.head_mirror,
            )
        except Exception:
            log.exception("sealing failed; trying again at the next interval")
            return False
        if done.seals:
            log.info("sealed %d record(s) in %d seal(s)", done.sealed, len(done.seals))
        return True

    def audit(self) -> bool:
        def report(result: DueResult) -> None:
            r = result
            log.info("audit %s %s: %s: %s", r.policy, r.month, r.outcome, r.detail)

        try:
            results = audit_due(self.factory, self.settings.timezone, report=report)
        except Exception:
            log.exception("due audits failed; trying again at the next interval")
            return False
        return not any(r.outcome == "failed" for r in results)

    def round(self, now: float, force: bool = False) -> bool:
        """Run whichever job is due at ``now`` (monotonic seconds); True when all succeeded."""
        ok = True
        if force or now >= self._next_seal:
            ok = self.seal() and ok
            self._next_seal = now + self.seal_every
        if force or now >= self._next_audit:
            ok = self.audit() and ok
            self._next_audit = now + self.audit_every
        return ok

    def forever(self) -> None:
        log.info(
            "job runner: sealing every %gs, auditing due months every %gs",
            self.seal_every,
            self.audit_every,
        )
        while True:
            self.round(time.monotonic())
            time.sleep(max(0.1, min(self._next_seal, self._next_audit) - time.monotonic()))
