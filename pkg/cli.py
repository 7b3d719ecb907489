"""The ``spinflip`` command line: one entry point with subcommands.

Exit codes: 0 success, 1 a fault while running (device gone, disk error), 2 bad input
(configuration, options, files), each with one line on standard error naming what was wrong.
"""

from __future__ import annotations

import argparse
import faulthandler
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, NoReturn

from spinflip.daemon.config import (
    DEFAULT_CONTROL_ENDPOINT,
    DEFAULT_DATA_ENDPOINT,
    ConfigError,
)

if TYPE_CHECKING:  # the subcommands import their modules lazily, at run time
    from spinflip.daemon.commands.loads_session import Step
    from spinflip.daemon.run.observation import RunResult


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # one line, exit 2
        self.exit(2, f"{self.prog}: error: {message}\n")


def _positive_seconds(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not v > 0 or v == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r}: expected a positive number of seconds")
    return v


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="spinflip", description="21 cm hydrogen-line spectrometer daemon and tools.")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    r = sub.add_parser("run", help="run the acquisition daemon in the foreground")
    r.add_argument("--config", metavar="FILE", help="TOML configuration (every key has a default)")
    r.add_argument("--source", metavar="SRC", help="sim, rtlsdr or replay:PATH (overrides [source] kind)")
    r.add_argument("--duration", type=_positive_seconds, metavar="S",
                   help="observing time in seconds (simulated time with --fast); default: until stopped")
    r.add_argument("--out", metavar="DIR", help="output folder (overrides [output] dir)")
    r.add_argument("--fast", action="store_true",
                   help="simulator and replay run as fast as the CPU allows")
    r.add_argument("--plan", metavar="FILE", help="observe an observing plan (TOML), then park "
                   "and exit; a plan interrupted by a restart resumes where it stopped")
    r.add_argument("--sample-rate", type=float, metavar="HZ", help="overrides [source] sample_rate")
    r.add_argument("--center-freq", type=float, metavar="HZ", help="overrides [source] center_freq")
    rd = sub.add_parser("reduce", help="scans to stacks, the l-v diagram, the rotation curve and "
                        "a face-on HI map")
    rd.add_argument("folders", nargs="+", metavar="DIR", help="folders of scans (searched "
                    "recursively; journals left by a crash too)")
    rd.add_argument("--out", metavar="DIR", help="output folder (default DIR/reduced of the first)")
    rd.add_argument("--constants", default="iau1985", metavar="NAME",
                    help="Galactic constants: iau1985 (R0 8.5 kpc, 220 km/s) or maser2014 "
                    "(8.34 kpc, 240 km/s)")
    rd.add_argument("--curve", default="flat", metavar="flat|measured",
                    help="rotation curve for the kinematic distances: flat at Theta0 or the one "
                    "measured (default flat)")
    rd.add_argument("--jobs", type=int, metavar="N", help="worker processes (default: the cores)")
    rd.add_argument("--json", action="store_true", help="a JSON summary on standard output")
    lo = sub.add_parser("loads", help="hot/cold-load (Y-factor) calibration, guided step by step")
    lo.add_argument("--config", metavar="FILE", help="TOML configuration (every key has a default)")
    lo.add_argument("--source", metavar="SRC", help="sim or rtlsdr (overrides [source] kind)")
    lo.add_argument("--out", metavar="DIR", help="output folder (overrides [output] dir); the "
                    "record goes to calibration.records or DIR/calibration")
    lo.add_argument("--fast", action="store_true", help="simulator as fast as the CPU allows")
    lo.add_argument("--yes", action="store_true",
                    help="do not wait for Enter at each step (the loads are already in place, "
                    "or the simulator places them)")
    w = sub.add_parser("watch", help="the terminal UI against a running daemon")
    w.add_argument("--connect", metavar="ENDPOINT", default=DEFAULT_DATA_ENDPOINT,
                   help=f"the daemon's data socket (default {DEFAULT_DATA_ENDPOINT})")
    w.add_argument("--control", metavar="ENDPOINT",
                   help="its control socket (default: the data socket's host, port + 1)")
    w.add_argument("--keys", metavar="DIR", help="client CURVE keys (spinflip keys DIR --client NAME)")
    d = sub.add_parser("demo", help="the simulator and the terminal UI together, a short observation")
    d.add_argument("--seconds", type=_positive_seconds, default=60.0, metavar="S",
                   help="observing time (default 60)")
    d.add_argument("--out", metavar="DIR", default="spinflip-data", help="where the scan goes")
    d.add_argument("--fast", action="store_true", help=argparse.SUPPRESS)  # tests: sim time
    c = sub.add_parser("ctl", help="send a command to a running daemon (its control socket)")
    c.add_argument("--connect", metavar="ENDPOINT", default=DEFAULT_CONTROL_ENDPOINT,
                   help=f"the daemon's control socket (default {DEFAULT_CONTROL_ENDPOINT})")
    c.add_argument("--keys", metavar="DIR", help="client CURVE keys (spinflip keys DIR --client NAME)")
    c.add_argument("--timeout", type=_positive_seconds, default=5.0, metavar="S",
                   help="seconds to wait for the reply (default 5)")
    c.add_argument("words", nargs="+", metavar="COMMAND [KEY=VALUE ...]",
                   help="status, start, stop, pause, resume, new_scan, calibrate, point, "
                   "set_integration, annotate")
    k = sub.add_parser("keys", help="create CURVE key pairs for the daemon or a client")
    k.add_argument("dir", metavar="DIR", help="the daemon's keys folder (publish.keys)")
    k.add_argument("--client", metavar="NAME", help="create a client key pair in DIR/NAME")
    co = sub.add_parser("collect", help="gather several daemons' live data in one place")
    co.add_argument("stations", nargs="+", metavar="NAME=ENDPOINT",
                    help="a station name and its daemon's data socket")
    co.add_argument("--relay", metavar="ENDPOINT", help="re-publish everything here, by station")
    co.add_argument("--archive", metavar="DIR", help="store every received integration here")
    co.add_argument("--keys", metavar="DIR", help="client CURVE keys for secured daemons")
    co.add_argument("--duration", type=_positive_seconds, metavar="S",
                    help="seconds to collect (default: until stopped)")
    pl = sub.add_parser("plan", help="the schedule of an observing plan, before anything moves")
    pl.add_argument("file", metavar="FILE", help="the plan (TOML)")
    pl.add_argument("--config", help="TOML configuration: the site and [pointing] limits")
    pl.add_argument("--start", metavar="UTC", help="start of the schedule, UTC ISO 8601 "
                    "(default: the plan's start, else now)")
    pl.add_argument("--json", action="store_true", help="machine-readable output")
    i = sub.add_parser("inspect", help="summary of a saved FITS scan")
    i.add_argument("file", metavar="FILE")
    i.add_argument("--json", action="store_true", help="machine-readable output")
    b = sub.add_parser("bench", help="DSP throughput and radiometer efficiency against a baseline")
    b.add_argument("--json", action="store_true", help="machine-readable output")
    b.add_argument("--seconds", type=_positive_seconds, default=2.0,
                   help="seconds of 2.4 MS/s data per measurement (default 2)")
    b.add_argument("--config", metavar="FILE", default=None,
                   help="configuration whose sample rate and channels set the core share")
    b.add_argument("--scaling", action="store_true",
                   help="throughput and peak memory of both chains over 256 .. 16384 channels")
    ch = sub.add_parser("chain", help="receiver-chain budget: Friis cascade, Tsys, beam, "
                        "sensitivity, expected HI (hardware/profiles/*.toml)")
    ch.add_argument("file", metavar="FILE", help="a receiver-chain profile (TOML)")
    dr = sub.add_parser("doctor", help="check the station: librtlsdr, dongle, DVB driver, "
                        "permissions, clock, disk, config, ports")
    dr.add_argument("--config", metavar="FILE", help="TOML configuration (as for run)")
    dr.add_argument("--out", metavar="DIR", help="output folder (as for run; overrides [output] dir)")
    so = sub.add_parser("soak", help="the daemon in real time on the simulator with two "
                        "subscribers: samples lost, RSS growth, CPU share")
    so.add_argument("--seconds", type=_positive_seconds, default=600.0, metavar="S",
                    help="how long (default 600)")
    so.add_argument("--source", metavar="replay:FILE", help="replay a .cu8 capture in real time "
                    "(looped) instead of the simulator: the daemon's own cost")
    so.add_argument("--sample-rate", type=float, default=2.4e6, metavar="HZ",
                    help="with --source: the capture's sample rate (default 2.4e6)")
    so.add_argument("--channels", type=int, default=1024, metavar="N",
                    help="with --source: spectrometer channels (default 1024)")
    so.add_argument("--json", action="store_true", help="machine-readable output")
    so.add_argument("--check", action="store_true",
                    help="exit 1 when a target is missed (samples or messages lost, RSS growth "
                    "above 5 %%, integrations not saved)")
    return p


def _cmd_chain(args: argparse.Namespace) -> int:
    from spinflip.daemon.commands.chain_table import chain_main
    return chain_main(args.file)


def _cmd_doctor(args: argparse.Namespace) -> int:
    from spinflip.daemon.commands.doctor import doctor_main
    return doctor_main(args.config, out_dir=args.out)


def _cmd_soak(args: argparse.Namespace) -> int:
    from spinflip.daemon.commands.soak import soak_main
    from spinflip.daemon.sources.base import parse_source_option
    replay = None
    if args.source is not None:
        src = parse_source_option(args.source)
        if src["kind"] != "replay":
            raise ValueError(f"--source {args.source}: soak takes replay:FILE (the simulator is "
                             "the default)")
        replay = src["path"]
        if not Path(replay).expanduser().is_file():
            raise ValueError(f"--source {args.source}: no such file")
    cfg_check = {"source": {"sample_rate": args.sample_rate},
                 "spectrometer": {"channels": args.channels}}
    from spinflip.daemon import config as config_mod
    config_mod.merge(config_mod.defaults(), cfg_check, origin="command line")
    return soak_main(args.seconds, args.json, args.check, replay, args.sample_rate,
                     args.channels)


def _cmd_run(args: argparse.Namespace) -> int:
    from spinflip.daemon.run.heap import limit_malloc_arenas, map_large_blocks
    limit_malloc_arenas()     # before any thread starts: a steady RSS (daemon/run/heap.py)
    map_large_blocks()
    from spinflip.daemon import config as config_mod
    from spinflip.daemon.run.observation import Daemon
    from spinflip.daemon.sources.base import parse_source_option
    cfg = config_mod.load(args.config)
    over: dict = {}
    if args.source:
        over.setdefault("source", {}).update(parse_source_option(args.source))
    if args.sample_rate is not None:
        over.setdefault("source", {})["sample_rate"] = args.sample_rate
    if args.center_freq is not None:
        over.setdefault("source", {})["center_freq"] = args.center_freq
    if args.out:
        over["output"] = {"dir": args.out}
    config_mod.merge(cfg, over, origin="command line")
    try:                      # a watchdog kill (SIGABRT) leaves every thread's stack in the log
        faulthandler.enable()
    except (OSError, ValueError):  # stderr is no file (run in-process under a capture)
        pass
    plan = None
    if args.plan:
        from spinflip.daemon.run.plan_file import load_plan
        plan = load_plan(args.plan)          # a bad plan: one line, exit 2, nothing written
    daemon = Daemon(cfg, fast=args.fast, duration_s=args.duration, plan=plan)
    daemon.install_signal_handlers()
    src = cfg["source"]["kind"]
    what = (f"plan {plan.name!r} ({sum(t.repeat for t in plan.targets)} visits)"
            if plan is not None else daemon.pointing.object)
    daemon.log(f"spinflip: observing {what} with the {src} source"
               f"{' (fast)' if args.fast else ''}; pointing driver {daemon.mount.driver}; "
               f"integrations of {daemon.blocks_per_integration * daemon.block_s:.1f} s")
    try:
        result = daemon.run()
    finally:                  # after a failure too: say what was saved, nothing more
        _report_saved(daemon.result, daemon.out_dir)
    if result.lost_samples:
        print(f"warning: {result.lost_samples} samples lost", file=sys.stderr)
    return 0


def _cmd_reduce(args: argparse.Namespace) -> int:
    from spinflip.reduce.command import reduce_folders
    if args.jobs is not None and args.jobs < 1:
        raise ValueError(f"--jobs {args.jobs}: expected 1 or more")
    warnings: list[str] = []

    def warn(text: str) -> None:
        warnings.append(text)
        print(f"warning: {text}", file=sys.stderr)
    result = reduce_folders(args.folders, args.out, args.constants, args.curve, args.jobs,
                            progress=not args.json and sys.stderr.isatty(), warn=warn)
    if args.json:
        print(json.dumps(result.as_json(), indent=2))
    else:
        print(f"reduced {result.scans_used} scans ({result.rows_used} rows) into "
              f"{result.targets} targets and {result.points} tangent points in "
              f"{result.seconds:.1f} s; {len(result.left_out)} files left out")
        if result.faceon_left_out:
            said = ", ".join(f"{n} {why.replace('_', ' ')}" for why, n in
                             sorted(result.faceon_left_out.items()) if n)
            print(f"face-on map: channels left out without a reliable distance: {said}")
        for f in result.files:
            print(f"wrote {f}")
    return 0


def _report_saved(result: RunResult, out_dir: Path) -> None:
    """One line per scan file written (integrations in it), or that none was."""
    for f in result.files:
        n = result.file_rows.get(str(f), result.rows)
        what = f"{n} integration{'s' if n != 1 else ''}"
        print(f"saved {what} to {f} ({result.observed_s:.1f} s observed in all)"
              if len(result.files) > 1 else
              f"saved {what} ({result.observed_s:.1f} s observed) to {f}")
    if not result.files:
        print(f"no integration saved in {out_dir}" + (
            f" ({result.rows} finished)" if result.rows else " (none finished)"))


def _cmd_loads(args: argparse.Namespace) -> int:
    from spinflip.daemon import config as config_mod
    from spinflip.daemon.calibration import loads as loads_mod
    from spinflip.daemon.calibration.tsys_plan import records_dir
    from spinflip.daemon.commands.loads_session import LoadsSession
    from spinflip.daemon.sources.base import parse_source_option
    cfg = config_mod.load(args.config)
    over: dict = {}
    if args.source:
        over.setdefault("source", {}).update(parse_source_option(args.source))
    if args.out:
        over["output"] = {"dir": args.out}
    config_mod.merge(cfg, over, origin="command line")

    def prompt(step: Step) -> None:
        print(step.instruction if not args.yes else f"Step {step.number} of {step.total}: "
              f"{step.title.lower()} ...", flush=True)
        if not args.yes:
            try:
                input()
            except EOFError:
                raise KeyboardInterrupt from None

    session = LoadsSession(cfg, prompt, fast=args.fast)
    try:
        record = session.run()
    except KeyboardInterrupt:
        print("cancelled: no calibration record written", file=sys.stderr)
        return 130
    path = loads_mod.save_record(record, records_dir(cfg))
    tcal = (f", noise source {record.noise_source_k:.2f} K" if record.noise_source_k else "")
    print(f"Y = {record.y:.4f}: Trx = {record.trx_k:.2f} K, Tsys on the cold sky = "
          f"{record.tsys_cold_k:.2f} K, gain {record.gain_counts_per_k:.4g} counts/K{tcal}")
    print(f"saved calibration record {record.name} to {path}")
    return 0


def _control_for(data_endpoint: str) -> str:
    """The control endpoint beside a data endpoint: same host, port + 1 (the defaults' rule)."""
    head, _, port = data_endpoint.rpartition(":")
    if not port.isdigit():
        raise ValueError(f"--connect {data_endpoint!r}: give --control too (no port to add 1 to)")
    return f"{head}:{int(port) + 1}"


def _cmd_watch(args: argparse.Namespace) -> int:
    from spinflip.tui.app import watch_main
    control = args.control or _control_for(args.connect)
    return watch_main(args.connect, control, args.keys)


def _cmd_demo(args: argparse.Namespace) -> int:
    from spinflip.tui.app import demo_main
    return demo_main(seconds=args.seconds, out_dir=args.out, fast=args.fast)


def _cmd_ctl(args: argparse.Namespace) -> int:
    from spinflip.daemon.live.control import ctl_main
    return ctl_main(args.connect, args.words, args.keys, args.timeout)


def _cmd_keys(args: argparse.Namespace) -> int:
    from spinflip.daemon.live.keys import keys_main
    return keys_main(Path(args.dir), args.client)


def _cmd_collect(args: argparse.Namespace) -> int:
    from spinflip.daemon.live.collect import main_collect
    return main_collect(args.stations, relay=args.relay, archive=args.archive, keys=args.keys,
                        duration=args.duration)


def _cmd_plan(args: argparse.Namespace) -> int:
    from astropy.time import Time
    from rich.console import Console

    from spinflip.daemon import config as config_mod
    from spinflip.daemon.run.plan_file import load_plan
    from spinflip.daemon.run.scheduler import limits_from_config, schedule
    from spinflip.daemon.sky import coordinates
    from spinflip.tui.plan_view import plan_chart, plan_table, skip_reasons
    cfg = config_mod.load(args.config)
    plan = load_plan(args.file)
    if args.start is not None:
        text = config_mod.utc_start(args.start)
        if text == "now":
            text = Time.now().isot
        start = Time(text, scale="utc")
    else:
        start = Time(plan.start, scale="utc") if plan.start else Time.now()
    site = cfg["site"]
    location = coordinates.site_location(site["lat"], site["lon"], site["height_m"])
    limits = limits_from_config(cfg)
    entries = schedule(plan, location, start, limits)
    if args.json:
        print(json.dumps([e.as_json() for e in entries], indent=2))
        return 0
    console = Console()
    n = sum(e.status == "scheduled" for e in entries)
    console.print(plan_table(entries, f"plan {plan.name}: {n} of {len(entries)} visits "
                             f"scheduled from {start.isot[:16]} UTC at {site['name']}"))
    console.print(skip_reasons(entries), end="")
    console.print(plan_chart(entries, location, limits, width=max(30, min(console.width, 100))))
    return 0


def _cmd_inspect(args: argparse.Namespace) -> int:
    from spinflip.daemon.commands.inspect import format_summary, summarize
    summary = summarize(Path(args.file))
    print(json.dumps(summary, indent=2) if args.json else format_summary(summary))
    return 0


def _cmd_bench(args: argparse.Namespace) -> int:
    from spinflip.daemon.commands.bench import format_bench, run_bench
    try:
        from spinflip.daemon.config import load as load_config
        cfg = load_config(args.config)
    except ConfigError as exc:
        print(f"spinflip bench: {exc}", file=sys.stderr)
        return 2
    if args.scaling:
        from spinflip.daemon.commands.bench import BLOCK_SAMPLES, _noise_u8
        from spinflip.daemon.commands.bench_stages import format_scaling, run_scaling
        raw = _noise_u8(max(16384 * 4, int(args.seconds * 2.4e6)), 1)
        result = run_scaling(raw, BLOCK_SAMPLES)
        print(json.dumps(result, indent=2) if args.json else format_scaling(result))
        return 0
    result = run_bench(seconds=args.seconds, cfg=cfg)
    print(json.dumps(result, indent=2) if args.json else format_bench(result))
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handler = {"run": _cmd_run, "reduce": _cmd_reduce, "loads": _cmd_loads, "inspect": _cmd_inspect, "plan": _cmd_plan,
               "bench": _cmd_bench, "ctl": _cmd_ctl, "keys": _cmd_keys,
               "watch": _cmd_watch, "demo": _cmd_demo,
               "collect": _cmd_collect, "chain": _cmd_chain, "doctor": _cmd_doctor,
               "soak": _cmd_soak}[args.command]
    from spinflip.daemon.run.supervisor import WorkerFailed
    from spinflip.daemon.sources.base import SourceError
    try:
        return handler(args)
    except (ConfigError, ValueError) as exc:     # bad input: configuration, options, files
        print(f"spinflip {args.command}: {exc}", file=sys.stderr)
        return 2
    except (SourceError, OSError, WorkerFailed) as exc:   # a fault while running
        print(f"spinflip {args.command}: {exc}", file=sys.stderr)
        return 1

if __name__ == "__main__":
    sys.exit(main())
