"""``spinflip chain FILE``: the receiver-chain budget of a profile, as rich tables.

Two renderables, each a pure function of a :class:`~spinflip.daemon.commands.receiver_chain.Budget`:

- :func:`stage_table`: one row per stage (the dongle last): name, gain (dB), noise figure (dB),
  noise temperature (K), contribution to the cascade referred to the feed input (K) and the
  cumulative gain from the feed input (dB), with the cascade total in the footer;
- :func:`summary_table`: cascade temperature, T_sys and its parts, beam, channel, radiometer
  noise per integration (total power, switched, switched and folded), expected HI antenna
  temperature, the dongle's share and input level, and how many warnings there are;
- :func:`warning_lines`: each warning as a line of its own ("WARNING: ..."), after the tables.

The formulas and the profile schema are in :mod:`spinflip.daemon.commands.receiver_chain`.
"""

from __future__ import annotations

from rich.console import Console, Group
from rich.table import Table
from rich.text import Text

from spinflip.daemon.commands.receiver_chain import Budget, chain_budget, load_profile


def _db(value: float | None, decimals: int = 1) -> str:
    if value is None:
        return "—"
    return f"{value + 0.0:+.{decimals}f}"   # + 0.0 turns -0.0 into 0.0


def stage_table(budget: Budget) -> Table:
    """The stage table of a budget (a rich Table)."""
    table = Table(title=Text(f"Receiver chain: {budget.profile.telescope_name}"),
                  show_footer=True, title_justify="left")
    table.add_column("stage", footer="cascade (at the feed input)")
    table.add_column("kind")
    table.add_column("gain dB", justify="right")
    table.add_column("NF dB", justify="right")
    table.add_column("T K", justify="right")
    table.add_column("contribution K", justify="right", footer=f"{budget.cascade_k:.1f} K")
    table.add_column("cumulative gain dB", justify="right")
    for row in budget.rows:
        s = row.stage
        # Text: a stage name from the profile is never taken as rich markup
        table.add_row(Text(s.name), s.kind, _db(s.gain_db, 2), f"{s.noise_figure_db:.2f}",
                      f"{s.noise_temp_k:.1f}", f"{row.contribution_k:.2f}",
                      _db(row.cumulative_gain_db))
    return table


def summary_table(budget: Budget) -> Table:
    """The summary table of a budget (a rich Table); warnings are rows of their own."""
    p = budget.profile
    s = budget.sensitivity
    table = Table(title="Budget", show_header=False, title_justify="left")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    table.add_column("how", style="dim")
    table.add_row("cascade temperature", f"{budget.cascade_k:.1f} K",
                  "Friis, referred to the feed input, dongle included")
    if budget.loss_ahead_k > 0:
        table.add_row("  of which loss ahead of the first amplifier",
                      f"{budget.loss_ahead_k:.1f} K", "(L - 1) T_phys")
    table.add_row("sky + continuum", f"{budget.sky_k:.1f} K", "from the profile")
    table.add_row("spillover", f"{budget.spillover_k:.1f} K", "from the profile")
    table.add_row("Tsys (expected)", f"{budget.tsys_k:.1f} K",
                  "sky + continuum + spillover + cascade")
    table.add_row("HPBW", f"{budget.hpbw_deg:.2f} deg",
                  f"{p.beamwidth_factor:g} lambda / D, D = {p.dish_diameter_m:g} m, 1420.406 MHz")
    table.add_row("channel", f"{budget.channel_hz:.1f} Hz",
                  f"{p.sample_rate_hz / 1e6:g} MHz / {p.channels} channels "
                  f"= {budget.channel_km_s:.3f} km/s")
    table.add_row(f"dT per {p.integration_s:g} s, total power", f"{s.total_power_k:.3f} K",
                  "Tsys / sqrt(B tau)")
    table.add_row(f"dT per {p.integration_s:g} s, freq.-switched", f"{s.switched_k:.3f} K",
                  "2 Tsys / sqrt(B tau): tau/2 per phase, differenced")
    table.add_row(f"dT per {p.integration_s:g} s, switched + folded", f"{s.folded_k:.3f} K",
                  "sqrt 2 Tsys / sqrt(B tau): both copies averaged")
    table.add_row("HI antenna temperature", f"{budget.hi_antenna_k:.1f} K",
                  f"eta_A {p.aperture_efficiency:g} x T_B {p.hi_brightness_k:g} K (beam-filling)")
    table.add_row("gain before the dongle", f"{budget.gain_before_dongle_db:.1f} dB",
                  f"{p.max_noise_fraction * 100:g} % rule needs {budget.needed_gain_db:.1f} dB")
    table.add_row("dongle's share of Tsys", f"{100 * budget.dongle_fraction:.1f} %",
                  f"{budget.dongle_k:.2f} K at the feed input")
    table.add_row("noise at the dongle input", f"{budget.dongle_input_dbm:.1f} dBm",
                  f"k T B G over {p.sample_rate_hz / 1e6:g} MHz; ADC range "
                  f"{p.adc_min_input_dbm:g} to {p.adc_max_input_dbm:g} dBm")
    table.add_row("warnings", str(len(budget.warnings)) if budget.warnings else "none",
                  "listed below" if budget.warnings else "")
    return table


def warning_lines(budget: Budget) -> list[Text]:
    """One visible line per warning of the budget ("WARNING: ...")."""
    return [Text(f"WARNING: {line}", style="bold red") for line in budget.warnings]


def render(budget: Budget) -> Group:
    """Both tables of a budget, then its warnings, one line each."""
    return Group(stage_table(budget), summary_table(budget), *warning_lines(budget))


def chain_main(path: str, console: Console | None = None) -> int:
    """Print the receiver-chain budget of the profile at ``path``; return 0.

    Parameters
    ----------
    path : str
        Profile TOML file.
    console : rich.console.Console, optional
        Where to print (a new Console on stdout if None).

    Returns
    -------
    int
        0.

    Raises
    ------
    ValueError
        (:class:`~spinflip.daemon.commands.receiver_chain.ProfileError`) a missing, unreadable or
        invalid profile; one line naming the file and the key. The command line maps it to
        exit code 2.
    """
    budget = chain_budget(load_profile(path))
    console = console if console is not None else Console()
    console.print(render(budget))
    return 0
