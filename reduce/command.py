"""``spinflip reduce DIR... [--out DIR] [--constants NAME] [--curve flat|measured] [--jobs N]
[--json]``: a night's (or a season's) scans to stacks, the l-v diagram, the rotation curve and a
face-on HI map.

Steps (each in its module):

1. find the scans under the folders and summarise each (position, rest frequency, rows):
   :mod:`spinflip.reduce.scans`; a file that cannot be used is left out with one line;
2. group them by target (:mod:`spinflip.reduce.grouping`);
3. stack each target (:mod:`spinflip.reduce.stack`), one group at a time in worker processes,
   so memory is bounded by a stack, not by the season;
4. terminal velocities and the rotation curve (:mod:`spinflip.reduce.tangent`), the l-v
   diagram (:mod:`spinflip.reduce.lv`), kinematic distances and the face-on map
   (:mod:`spinflip.reduce.faceon`);
5. write ``reduction.fits``, the CSV files (:mod:`spinflip.reduce.outputs`) and the pictures
   (:mod:`spinflip.reduce.plots`, matplotlib Agg).

Bad input (no folder, no usable scan, an output folder that cannot be written) raises
:class:`ReduceError` with one line (exit 2); files left out are warnings with their reasons.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spinflip.reduce import faceon, grouping, lv, outputs, scans, stack, tangent
from spinflip.reduce.constants import CONSTANTS, GalacticConstants
from spinflip.reduce.profile import Stack

#: Curves the face-on map may take its distances from.
CURVES = ("flat", "measured")


class ReduceError(ValueError):
    """Bad input to the reduction: one line (exit 2)."""


@dataclass
class ReduceResult:
    """What a reduction did."""

    out: Path
    files: list[Path] = field(default_factory=list)
    scans_used: int = 0
    rows_used: int = 0
    targets: int = 0
    points: int = 0
    left_out: list[tuple[str, str]] = field(default_factory=list)   # (file, reason)
    faceon_left_out: dict[str, int] = field(default_factory=dict)
    seconds: float = 0.0

    def as_json(self) -> dict:
        return {"out": str(self.out), "files": [str(f) for f in self.files],
                "scans_used": self.scans_used, "rows_used": self.rows_used,
                "targets": self.targets, "tangent_points": self.points,
                "left_out": [{"file": f, "reason": r} for f, r in self.left_out],
                "faceon_channels_left_out": self.faceon_left_out, "seconds": self.seconds}


def constants_named(name: str) -> GalacticConstants:
    try:
        return CONSTANTS[name]
    except KeyError:
        raise ReduceError(f"--constants {name!r}: expected one of "
                          + ", ".join(CONSTANTS)) from None


def _stack_group(paths: Sequence[str]) -> tuple[Stack | None, list[tuple[str, str]]]:
    """Worker: read one target's scans and stack them (None when none was usable)."""
    rows, bad = [], []
    for item in scans.iter_scans([Path(p) for p in paths]):
        if isinstance(item, scans.Unusable):
            bad.append((str(item.path), item.reason))
        else:
            rows.append(item)
    if not rows:
        return None, bad
    try:
        return stack.stack_target(rows), bad
    except ValueError as exc:            # one line: what made the group unusable
        return None, bad + [(", ".join(Path(p).name for p in paths), str(exc))]


def reduce_folders(folders: Sequence[str | Path], out: str | Path | None = None,
                   constants: str = "iau1985", curve: str = "flat", jobs: int | None = None,
                   progress: bool = True, warn: Callable[[str], None] | None = None
                   ) -> ReduceResult:
    """Reduce every scan under ``folders`` into ``out`` (default: ``reduced`` in the first)."""
    t0 = time.perf_counter()
    warn = warn or (lambda text: None)
    consts = constants_named(constants)
    if curve not in CURVES:
        raise ReduceError(f"--curve {curve!r}: expected one of {', '.join(CURVES)}")
    dirs = [Path(f).expanduser() for f in folders]
    if not dirs:
        raise ReduceError("no folder given: spinflip reduce DIR [DIR ...]")
    for d in dirs:
        if not d.is_dir():
            raise ReduceError(f"{d}: no such folder")
    out_dir = Path(out).expanduser() if out is not None else dirs[0] / "reduced"
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ReduceError(f"--out {out_dir}: cannot be made ({exc.strerror or exc})") from None
    result = ReduceResult(out=out_dir)
    paths: list[Path] = []
    for item in scans.find_scan_files(dirs):
        if isinstance(item, scans.Unusable):
            result.left_out.append((str(item.path), item.reason))
        elif out_dir.resolve() not in item.resolve().parents:    # not our own products
            paths.append(item)
    if not paths:
        raise ReduceError(f"{', '.join(str(d) for d in dirs)}: no spinflip scan "
                          "(scan-*.fits or scan-*.journal) found")
    jobs = max(1, jobs or os.cpu_count() or 1)
    # 1. summaries (cheap: header and positions), in parallel
    with _pool(jobs) as pool, _progress(progress) as bar:
        task = bar.add_task("reading scans", total=len(paths))
        summaries = []
        for item in pool.map(scans.summarise, paths, chunksize=16):
            bar.advance(task)
            if isinstance(item, scans.Unusable):
                result.left_out.append((str(item.path), item.reason))
            else:
                summaries.append(item)
        check = scans.RestFrequencyCheck()
        usable = []
        for summary in summaries:
            bad = check(summary.path, summary.restfreq_hz)
            if bad is not None:
                result.left_out.append((str(bad.path), bad.reason))
            else:
                usable.append(summary)
        groups = grouping.group_by_target(usable)
        task = bar.add_task("stacking targets", total=len(groups))
        stacks: list[Stack] = []
        for st, bad in pool.map(_stack_group, [[str(s.path) for s in g] for g in groups]):
            bar.advance(task)
            result.left_out.extend(bad)
            if st is not None:
                stacks.append(st)
    for f, reason in result.left_out:
        warn(f"left out {f}: {reason}")
    if not stacks:
        raise ReduceError(f"{', '.join(str(d) for d in dirs)}: no usable scan "
                          f"({len(paths)} looked at, {len(result.left_out)} left out)")
    stacks.sort(key=lambda s: (s.glon_deg % 360.0, s.glat_deg))
    result.targets = len(stacks)
    result.scans_used = sum(s.n_scans for s in stacks)
    result.rows_used = sum(s.n_rows for s in stacks)
    # 2. the Galaxy
    points = tangent.rotation_curve(
        p for p in (tangent.terminal_velocity(s, consts) for s in stacks) if p is not None)
    result.points = len(points)
    rc = None
    if curve == "measured":
        if len(points) < 2:
            warn("--curve measured: fewer than two tangent points; the face-on map uses a flat "
                 "curve")
        else:
            rc = tangent.interpolated_curve(points, consts)
    facemap = faceon.face_on_map(stacks, consts, rc)
    result.faceon_left_out = dict(facemap.left_out)
    image = lv.lv_image(stacks)
    # 3. the files
    from spinflip.reduce import plots  # matplotlib only here
    result.files.append(outputs.write_fits(out_dir / "reduction.fits", stacks, points, facemap,
                                           consts))
    result.files.extend(outputs.write_csvs(out_dir, stacks, points, facemap))
    result.files.append(plots.lv_png(out_dir / "lv-diagram.png", image, points))
    result.files.append(plots.rotation_curve_png(out_dir / "rotation-curve.png", points,
                                                 consts))
    result.files.append(plots.faceon_png(out_dir / "faceon.png", facemap))
    result.seconds = time.perf_counter() - t0
    return result


class _pool:
    """A process pool for ``jobs`` > 1, else the same interface in this process."""

    def __init__(self, jobs: int):
        self.jobs = jobs
        self.executor: ProcessPoolExecutor | None = None

    def __enter__(self) -> _pool:
        if self.jobs > 1:
            import multiprocessing
            self.executor = ProcessPoolExecutor(
                self.jobs, mp_context=multiprocessing.get_context("forkserver"))
        return self

    def __exit__(self, *exc: object) -> None:
        if self.executor is not None:
            self.executor.shutdown()

    def map(self, fn: Callable, items: Sequence, chunksize: int = 1) -> Iterator:
        """Results in order, each as soon as it is ready."""
        if self.executor is None:
            return (fn(x) for x in items)
        return self.executor.map(fn, items, chunksize=max(1, chunksize))


class _progress:
    """A rich progress bar on standard error (silent when ``show`` is False)."""

    def __init__(self, show: bool):
        self.show = show
        self.bar: Any = None

    def __enter__(self) -> _progress:
        if self.show:
            from rich.console import Console
            from rich.progress import Progress
            self.bar = Progress(console=Console(stderr=True), transient=True)
            self.bar.start()
        return self

    def __exit__(self, *exc: object) -> None:
        if self.bar is not None:
            self.bar.stop()

    def add_task(self, text: str, total: int) -> int:
        return int(self.bar.add_task(text, total=total)) if self.bar is not None else 0

    def advance(self, task: int) -> None:
        if self.bar is not None:
            self.bar.advance(task)
