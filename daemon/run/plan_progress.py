"""What a plan has done, on disk, so that a plan interrupted by a restart (power cut, systemd
restart, a crash) resumes where it stopped without repeating a finished visit.

One small JSON file per plan in the output folder, ``plan-<name>-<digest>.progress.json``,
where ``<digest>`` is the first 12 hex digits of the SHA-256 of the plan's name and targets
(:func:`plan_digest`): an edited plan is a new plan and starts from the beginning, the old
file stays. The file is replaced atomically after every visit
(:func:`spinflip.daemon.storage.durable.replace_atomically`), so a power cut leaves either the
state before the visit or after it. A visit is recorded once it ends: ``done`` (its on-source
time observed), ``abandoned`` (the mount failed; not tried again) or ``skipped`` (by the
observer). A visit cut short by a stop or a crash is not recorded and is observed again.

A file that cannot be read as such (damaged, another program's) is set aside as
``<file>.bad`` and the plan starts from the beginning, said so in an event.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

from spinflip.daemon.run.plan_file import Plan
from spinflip.daemon.storage.durable import replace_atomically

#: What a recorded visit may have become.
OUTCOMES = ("done", "abandoned", "skipped")


def plan_digest(plan: Plan) -> str:
    """12 hex digits naming the plan's content (its name and targets, in file order)."""
    text = repr((plan.name, plan.targets))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:12]


def visit_key(target_index: int, visit: int) -> str:
    """The key of the ``visit``-th visit (1-based) of target ``target_index`` (0-based)."""
    return f"{target_index}:{visit}"


@dataclass
class PlanProgress:
    """The visits of one plan that have ended, kept in ``path``."""

    path: Path
    plan_name: str
    visits: dict[str, dict] = field(default_factory=dict)   # key -> {outcome, scan, time_utc, reason}
    note: str = ""                # what opening the file found, for an event ("" when new)

    @classmethod
    def open(cls, out_dir: Path, plan: Plan) -> PlanProgress:
        """The progress of ``plan`` in ``out_dir`` (empty when it never ran there)."""
        slug = re.sub(r"[^A-Za-z0-9_.-]+", "_", plan.name).strip("._")[:40] or "plan"
        path = Path(out_dir) / f"plan-{slug}-{plan_digest(plan)}.progress.json"
        progress = cls(path, plan.name)
        if not path.exists():
            return progress
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
            visits = data["visits"]
            if data.get("plan") != plan.name or not isinstance(visits, dict) or not all(
                    isinstance(v, dict) and v.get("outcome") in OUTCOMES
                    for v in visits.values()):
                raise ValueError("not a progress file of this plan")
        except (OSError, ValueError, KeyError, TypeError) as exc:
            bad = path.with_name(path.name + ".bad")
            try:
                path.replace(bad)
            except OSError:
                pass
            progress.note = (f"plan progress {path.name} is unreadable ({exc}); set aside as "
                             f"{bad.name}: the plan starts from the beginning")
            return progress
        progress.visits = {str(k): dict(v) for k, v in visits.items()}
        progress.note = (f"resuming plan {plan.name!r} from {path.name}: "
                         f"{progress.count('done')} visits done, "
                         f"{len(progress.visits) - progress.count('done')} abandoned or skipped")
        return progress

    def ended(self, key: str) -> bool:
        """Whether the visit has ended (done, abandoned or skipped): not to be made again."""
        return key in self.visits

    def count(self, outcome: str) -> int:
        return sum(1 for v in self.visits.values() if v["outcome"] == outcome)

    def record(self, key: str, outcome: str, scan: str | None, time_utc: str,
               reason: str = "") -> None:
        """Record how a visit ended and write the file at once (atomically)."""
        assert outcome in OUTCOMES, outcome
        self.visits[key] = {"outcome": outcome, "scan": scan, "time_utc": time_utc,
                            "reason": reason}
        text = json.dumps({"plan": self.plan_name, "visits": self.visits}, indent=1,
                          sort_keys=True, allow_nan=False) + "\n"
        replace_atomically(self.path, text.encode("utf-8"))
