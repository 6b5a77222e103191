"""Tables (CSV, JSON) and plots (PNG) of an analysis, and the short table for the terminal.

Every heading carries its unit. Files go to RUN/analysis/.
"""

import csv
import json
import math
from pathlib import Path

import numpy as np

from .exceptions import RunFolderError
from .report_page import PAGE, write_page
from .units import coordinate_shown, coordinate_unit_shown


def _fmt(value, digits=3):
    return "nan" if value is None or not np.isfinite(value) else f"{value:.{digits}f}"


def _axis_label(name, is_angle):
    return f"{name} ({coordinate_unit_shown(is_angle)})"


def _shown_centres(analysis, profile):
    """A profile's bin centres as people read them (degrees for angles)."""
    return [coordinate_shown(c, _is_angle(analysis, n)) for c, n in zip(profile.centres, profile.coordinates)]


def _is_angle(analysis, name):
    return name in analysis.angle_coordinates


def format_summary(analysis):
    """A few lines for the terminal: basin populations and ΔG, condition overview."""
    unit = analysis.energy_unit
    lines = [f"analysis of {analysis.folder} at {analysis.temperature:.2f} K "
             f"({int(analysis.samples_k.sum())} uncorrelated samples from {len(analysis.samples_k)} "
             f"condition{'s' if len(analysis.samples_k) != 1 else ''})",
             f"error bars: {_method(analysis)}"]
    basins = analysis.basins
    if basins is not None:
        lines.append(f"{'basin':12s} {'population':>11s} {'± error':>9s} {'95% low':>8s} {'95% high':>8s} "
                     f"{'G − G(' + basins.names[0] + ') (' + unit + ')':>24s} {'± error':>9s}  verdict")
        for i, name in enumerate(basins.names):
            lines.append(f"{name:12s} {_fmt(basins.populations[i], 4):>11s} {_fmt(basins.d_populations[i], 4):>9s} "
                         f"{_fmt(basins.populations_low[i], 4):>8s} {_fmt(basins.populations_high[i], 4):>8s} "
                         f"{_fmt(basins.Delta_g[0, i]):>24s} {_fmt(basins.d_Delta_g[0, i]):>9s}  "
                         f"{_word(_population_verdict(analysis, i))}")
        lines += _bound_notes(basins)
        lines += _verdict_notes(analysis)
    for k, profile in enumerate(analysis.profiles):
        if len(profile.coordinates) == 1:
            finite = np.isfinite(profile.f)
            top = np.nanmax(profile.f[finite]) if finite.any() else math.nan
            lines.append(f"PMF along {profile.coordinates[0]}: {finite.sum()} bins with samples, "
                         f"highest {_fmt(top, 2)} {unit} above the minimum{_profile_tally(analysis, k)}")
    if analysis.poor_pairs:
        lines.append(f"warning: {len(analysis.poor_pairs)} neighbouring pair(s) overlap poorly (see above)")
    if analysis.swaps is not None:
        trips = analysis.swaps.round_trips_r
        lines.append(f"round trips per walker: {', '.join(str(int(t)) for t in trips)}")
    lines += _acceptance_notes(analysis)
    return "\n".join(lines)


# -- verdicts -----------------------------------------------------------------------------
VERDICT_HEADINGS = ["verdict", "verdict reason", "independent samples", "first half", "second half",
                    "halves differ by (combined errors)"]


def _word(verdict):
    return "–" if verdict is None else verdict.word


def _population_verdict(analysis, i):
    return analysis.verdicts.populations[i] if analysis.verdicts is not None else None


def _delta_g_verdict(analysis, i, j):
    if analysis.verdicts is None or i == j:
        return None
    return analysis.verdicts.delta_g.get((min(i, j), max(i, j)))


def _verdict_cells(verdict, digits=4):
    if verdict is None:
        return ["", "", "", "", "", ""]
    return [verdict.word, verdict.reason, _fmt(verdict.independent, 0), _fmt(verdict.first_half, digits),
            _fmt(verdict.second_half, digits), _fmt(verdict.halves_z, 2)]


def _verdict_json(verdict):
    if verdict is None:
        return None
    return {"word": verdict.word, "reason": verdict.reason, "independent samples": _number(verdict.independent),
            "first half": _number(verdict.first_half), "second half": _number(verdict.second_half),
            "halves differ by (combined errors)": _number(verdict.halves_z)}


def _verdict_notes(analysis):
    """One line per basin population and ΔG saying why its verdict is what it is."""
    if analysis.verdicts is None:
        return []
    names = analysis.basins.names
    notes = [f"  {name}: {v.word}, {v.reason}" for name, v in zip(names, analysis.verdicts.populations)]
    notes += [f"  ΔG {names[i]} → {names[j]}: {v.word}, {v.reason}"
              for (i, j), v in analysis.verdicts.delta_g.items() if i == 0]
    return notes


def _profile_tally(analysis, k):
    counts = _profile_counts(analysis, k)
    return "" if counts is None else "; bins " + ", ".join(f"{n} {w}" for w, n in counts.items() if n)


def _acceptance_notes(analysis):
    if analysis.verdicts is None or not analysis.verdicts.acceptance:
        return []
    rows = analysis.verdicts.acceptance
    unsettled = [f"{i}–{j} {v.word} ({v.reason})" for i, j, _, _, v in rows if v.word != "settled"]
    head = f"swap acceptance of {len(rows)} neighbouring pairs: "
    return [head + ("all settled" if not unsettled else "; ".join(unsettled))]


def _method(analysis):
    """The error method in words, with failed resamples for a bootstrap."""
    u = analysis.uncertainty
    return u.label if u.method == "asymptotic" else f"{u.label}, {u.failed} failed"


def _bound_notes(basins):
    """A note for each population whose ± error reaches past 0 or 1, where the bar means nothing."""
    notes = []
    for name, p, dp in zip(basins.names, basins.populations, basins.d_populations):
        if np.isfinite(dp) and (p - dp < 0.0 or p + dp > 1.0):
            side = "below 0" if p - dp < 0.0 else "above 1"
            notes.append(f"note: the ± error of {name} reaches {side}, so it is no error bar there; "
                         "its 95% interval (inside 0 to 1) is the range to quote.")
    return notes


#: Every file boost analyze writes; an output folder may hold nothing else (pmf-*.csv/png aside).
OUTPUT_FILES = frozenset({"summary.json", "conditions.csv", "overlap.csv", "basins.csv",
                          "free-energy-differences.csv", "swap-acceptance.csv", "round-trips.csv",
                          "neighbour-swaps.csv", "convergence.csv", "windows.png", "walker-traces.png",
                          "swap-acceptance.png", "convergence.png", "overlap.png", PAGE})


def claim_output_folder(out):
    """Make ``out`` (new, empty, or holding only files boost analyze writes) ready for writing.

    A folder with anything else in it is refused with one line, so no file of the user's is
    ever replaced by a table or plot.
    """
    out = Path(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
        foreign = sorted(p.name for p in out.iterdir()
                         if p.name not in OUTPUT_FILES and not _is_profile_file(p.name) or not p.is_file())
    except OSError as err:
        raise RunFolderError(f"{out}: cannot be used for the analysis output ({err.strerror or err}); "
                             "choose a folder you can write to.") from None
    if foreign:
        name = repr(foreign[0]) if len(repr(foreign[0])) <= 60 else repr(foreign[0])[:57] + "..."
        raise RunFolderError(f"{out}: holds {name}, which boost analyze did not write; choose a new or empty "
                             "folder for the tables and plots.")
    return out


def _is_profile_file(name):
    return name.startswith("pmf-") and name.endswith((".csv", ".png"))


def write_report(analysis, folder=None):
    """Write CSV/JSON tables and PNG plots; return the folder they are in."""
    out = claim_output_folder(folder or Path(analysis.folder) / "analysis")
    _write_conditions(analysis, out)
    if analysis.basins is not None:
        _write_basins(analysis, out)
    for k, profile in enumerate(analysis.profiles):
        _write_profile(analysis, k, profile, out)
    if analysis.swaps is not None:
        _write_swaps(analysis, out)
    if analysis.verdicts is not None and analysis.verdicts.cumulative is not None:
        _write_convergence(analysis, out)
    summary = _summary(analysis)
    (out / "summary.json").write_text(json.dumps(summary, indent=2))
    _plot_all(analysis, out)
    write_page(out, summary, analysis.about, _page_warnings(analysis))
    return out


def _page_warnings(analysis):
    """What the terminal summary warns of, for the report page."""
    notes = [f"{analysis.condition_labels[i]} and {analysis.condition_labels[j]} overlap poorly "
             f"(MBAR overlap {o:.3f}): add windows between them or soften the springs." for i, j, o in analysis.poor_pairs]
    if analysis.basins is not None:
        notes += _bound_notes(analysis.basins)
        notes += [line for line in _verdict_notes(analysis) if ": settled," not in line]
    return [note.removeprefix("note: ").strip() for note in notes if note.strip()]


def _write_rows(path, header, rows):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)


def _write_conditions(analysis, out):
    method = _method(analysis)
    rows = [(k, analysis.condition_labels[k], int(analysis.samples_k[k]), int(analysis.thinning_k[k]),
             int(analysis.t0_k[k]), _fmt(analysis.g_k[k], 2), _fmt(analysis.f_k[k], 4), _fmt(analysis.df_k[k], 4),
             method)
            for k in range(len(analysis.samples_k))]
    _write_rows(out / "conditions.csv", ["condition", "label", "samples used", "1 in (memory thinning)",
                                         "equilibration discarded (cycles)", "statistical inefficiency (cycles)",
                                         "f (kT)", "f error (kT)", "error method"], rows)
    _write_rows(out / "overlap.csv", ["condition"] + [str(k) for k in range(len(analysis.overlap))],
                [[k] + [f"{x:.4f}" for x in row] for k, row in enumerate(analysis.overlap)])


def _write_basins(analysis, out):
    basins, unit, method = analysis.basins, analysis.energy_unit, _method(analysis)
    _write_rows(out / "basins.csv", ["basin", "population", "population error", "population 95% low",
                                     "population 95% high", "error method"] + VERDICT_HEADINGS,
                [[n, _fmt(basins.populations[i], 5), _fmt(basins.d_populations[i], 5),
                  _fmt(basins.populations_low[i], 5), _fmt(basins.populations_high[i], 5), method]
                 + _verdict_cells(_population_verdict(analysis, i), 5)
                 for i, n in enumerate(basins.names)])
    rows = [[a, b, _fmt(basins.Delta_g[i, j], 4), _fmt(basins.d_Delta_g[i, j], 4),
             _fmt(basins.Delta_g_low[i, j], 4), _fmt(basins.Delta_g_high[i, j], 4), method]
            + _verdict_cells(_delta_g_verdict(analysis, i, j))
            for i, a in enumerate(basins.names) for j, b in enumerate(basins.names) if i != j]
    _write_rows(out / "free-energy-differences.csv",
                ["from basin", "to basin", f"ΔG ({unit})", f"ΔG error ({unit})", f"ΔG 95% low ({unit})",
                 f"ΔG 95% high ({unit})", "error method"] + VERDICT_HEADINGS, rows)


def _profile_name(profile):
    return "pmf-" + "-".join(profile.coordinates)


def _write_profile(analysis, k, profile, out):
    unit, method = analysis.energy_unit, _method(analysis)
    labels = [_axis_label(n, _is_angle(analysis, n)) for n in profile.coordinates]
    grids = np.meshgrid(*_shown_centres(analysis, profile), indexing="ij")
    verdicts = (analysis.verdicts.profiles[k] if analysis.verdicts is not None
                else np.full(profile.f.shape, None, dtype=object))
    rows = [[_fmt(g[index], 5) for g in grids] + [_fmt(profile.f[index], 4), _fmt(profile.df[index], 4),
                                                   _fmt(profile.f_low[index], 4), _fmt(profile.f_high[index], 4),
                                                   int(profile.counts[index]), method]
            + _verdict_cells(verdicts[index])
            for index in np.ndindex(profile.f.shape)]
    _write_rows(out / f"{_profile_name(profile)}.csv",
                labels + [f"PMF ({unit})", f"PMF error ({unit})", f"PMF 95% low ({unit})", f"PMF 95% high ({unit})",
                          "samples", "error method"] + VERDICT_HEADINGS, rows)


def _write_swaps(analysis, out):
    swaps = analysis.swaps
    n = len(swaps.acceptance_ij)
    _write_rows(out / "swap-acceptance.csv", ["condition"] + [str(k) for k in range(n)],
                [[k] + [_fmt(x, 4) for x in row] for k, row in enumerate(swaps.acceptance_ij)])
    _write_rows(out / "round-trips.csv", ["walker", "round trips"],
                [(r, int(t)) for r, t in enumerate(swaps.round_trips_r)])
    if analysis.verdicts is not None and analysis.verdicts.acceptance:
        _write_rows(out / "neighbour-swaps.csv", ["condition", "other condition", "acceptance (fraction)", "attempts"]
                    + VERDICT_HEADINGS,
                    [[i, j, _fmt(a, 4), n] + _verdict_cells(v) for i, j, a, n, v in analysis.verdicts.acceptance])


def _clean(array):
    return [None if not np.isfinite(x) else float(x) for x in np.ravel(array)]


def _number(value):
    return float(value) if np.isfinite(value) else None


def _uncertainty_summary(analysis):
    u = analysis.uncertainty
    result = {"method": _method(analysis), "kind": u.method}
    if u.method == "bootstrap":
        result.update({"resamples": u.resamples, "failed resamples": u.failed, "block (cycles)": u.block_cycles,
                       "block (ps)": _number(u.block_cycles * u.cycle_ps),
                       "block chosen from the walkers": u.block_chosen,
                       "largest statistical inefficiency along a walker (cycles)": _number(u.walker_g)})
    return result


def _profile_counts(analysis, k):
    """Bins of profile k per verdict word (None without verdicts)."""
    if analysis.verdicts is None:
        return None
    words = [v.word for v in np.ravel(analysis.verdicts.profiles[k]) if v is not None]
    return {w: words.count(w) for w in ("settled", "drifting", "too few samples")}


def _summary(analysis):
    result = {"temperature (K)": analysis.temperature, "energy unit": analysis.energy_unit,
              "cycles in ledger": analysis.n_cycles, "error bars": _uncertainty_summary(analysis),
              "conditions": [{"label": analysis.condition_labels[k], "samples used": int(analysis.samples_k[k]),
                              "1 in (memory thinning)": int(analysis.thinning_k[k]),
                              "equilibration discarded (cycles)": int(analysis.t0_k[k]),
                              "statistical inefficiency (cycles)": _number(analysis.g_k[k]),
                              "f (kT)": float(analysis.f_k[k]), "f error (kT)": _number(analysis.df_k[k])}
                             for k in range(len(analysis.samples_k))]}
    if analysis.basins is not None:
        b, unit = analysis.basins, analysis.energy_unit
        result["basins"] = {name: {"population": float(b.populations[i]),
                                   "population error": _number(b.d_populations[i]),
                                   "population 95% low": _number(b.populations_low[i]),
                                   "population 95% high": _number(b.populations_high[i]),
                                   "verdict": _verdict_json(_population_verdict(analysis, i))}
                            for i, name in enumerate(b.names)}
        result["free-energy differences"] = [
            {"from": a, "to": c, f"ΔG ({unit})": float(b.Delta_g[i, j]),
             f"ΔG error ({unit})": _number(b.d_Delta_g[i, j]),
             f"ΔG 95% low ({unit})": _number(b.Delta_g_low[i, j]),
             f"ΔG 95% high ({unit})": _number(b.Delta_g_high[i, j]),
             "verdict": _verdict_json(_delta_g_verdict(analysis, i, j))}
            for i, a in enumerate(b.names) for j, c in enumerate(b.names) if i < j]
    result["profiles"] = [{"coordinates": list(p.coordinates), "file": _profile_name(p) + ".csv",
                           "bins by verdict": _profile_counts(analysis, k)} for k, p in enumerate(analysis.profiles)]
    if analysis.verdicts is not None and analysis.verdicts.acceptance:
        result["neighbour swaps"] = [{"conditions": [i, j], "acceptance": _number(a), "attempts": n,
                                      "verdict": _verdict_json(v)} for i, j, a, n, v in analysis.verdicts.acceptance]
    if analysis.swaps is not None:
        result["round trips per walker"] = [int(t) for t in analysis.swaps.round_trips_r]
    return result


def _plot_all(analysis, out):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    for profile in analysis.profiles:
        fig, ax = plt.subplots(figsize=(6, 4))
        if len(profile.coordinates) == 1:
            x, f, df = _shown_centres(analysis, profile)[0], profile.f, profile.df
            ax.plot(x, f, "o-", ms=3, color="tab:blue")
            ax.fill_between(x, f - df, f + df, color="tab:blue", alpha=0.25, label="± one standard error")
            ax.set_xlabel(_axis_label(profile.coordinates[0], _is_angle(analysis, profile.coordinates[0])))
            ax.set_ylabel(f"PMF ({analysis.energy_unit})")
            ax.legend(loc="best")
        else:
            x, y = _shown_centres(analysis, profile)
            f = np.ma.masked_invalid(profile.f.T)
            image = ax.contourf(x, y, f, levels=20, cmap="viridis")
            fig.colorbar(image, ax=ax, label=f"PMF ({analysis.energy_unit})")
            _outline_basins(ax, analysis, profile.coordinates)
            ax.set_xlabel(_axis_label(profile.coordinates[0], _is_angle(analysis, profile.coordinates[0])))
            ax.set_ylabel(_axis_label(profile.coordinates[1], _is_angle(analysis, profile.coordinates[1])))
        ax.set_title(f"free-energy profile at {analysis.temperature:.1f} K")
        fig.tight_layout()
        fig.savefig(out / f"{_profile_name(profile)}.png", dpi=120)
        plt.close(fig)
    if len(analysis.overlap) > 1:
        _plot_overlap(analysis, out, plt)
    if analysis.window_values:
        _plot_windows(analysis, out, plt)
    if analysis.swaps is not None:
        _plot_swaps(analysis, out, plt)
    if analysis.verdicts is not None and analysis.verdicts.cumulative is not None:
        _plot_convergence(analysis, out, plt)


def _outline_basins(ax, analysis, coordinates):
    """Each basin of a 2-D profile's axes as a labelled box (two or four where it wraps at ±180°)."""
    from matplotlib.patches import Rectangle

    limits = (ax.get_xlim(), ax.get_ylim())
    for name, intervals in (analysis.basin_intervals or {}).items():
        if not any(c in intervals for c in coordinates):
            continue
        spans = []
        for c, (low, high) in zip(coordinates, limits):      # a basin silent on an axis spans all of it
            lower, upper = ((float(np.clip(coordinate_shown(v, _is_angle(analysis, c)), low, high))
                             for v in intervals[c]) if c in intervals else (low, high))
            spans.append([(lower, upper)] if lower <= upper else [(lower, 180.0), (-180.0, upper)])
        for (x0, x1) in spans[0]:
            for (y0, y1) in spans[1]:
                ax.add_patch(Rectangle((x0, y0), x1 - x0, y1 - y0, fill=False, edgecolor="black", lw=1.2, ls="--"))
        (x0, _), (y0, _) = spans[0][0], spans[1][0]
        ax.annotate(name, (x0, y0), xytext=(4, 4), textcoords="offset points", fontsize=9,
                    bbox={"boxstyle": "round,pad=0.2", "facecolor": "white", "alpha": 0.8, "linewidth": 0})


def _plot_overlap(analysis, out, plt):
    n = len(analysis.overlap)
    fig, ax = plt.subplots(figsize=(5.5, 4.5))
    image = ax.imshow(analysis.overlap, cmap="viridis", vmin=0, origin="upper")
    fig.colorbar(image, ax=ax, label="MBAR overlap")
    ticks = np.arange(n) if n <= 24 else np.arange(0, n, max(1, n // 12))
    ax.set_xticks(ticks)
    ax.set_yticks(ticks)
    ax.set_xlabel("condition")
    ax.set_ylabel("condition")
    ax.set_title("overlap between conditions")
    fig.tight_layout()
    fig.savefig(out / "overlap.png", dpi=120)
    plt.close(fig)


def _plot_windows(analysis, out, plt):
    fig, ax = plt.subplots(figsize=(6, 4))
    name = analysis.umbrella_coordinates[0]
    for values in analysis.window_values:
        if len(values):
            ax.hist(coordinate_shown(values[:, 0], _is_angle(analysis, name)), bins=40, histtype="step")
    ax.set_xlabel(_axis_label(name, _is_angle(analysis, name)))
    ax.set_ylabel("samples")
    ax.set_title("coordinate histograms, one per window")
    fig.tight_layout()
    fig.savefig(out / "windows.png", dpi=120)
    plt.close(fig)


def _plot_swaps(analysis, out, plt):
    fig, ax = plt.subplots(figsize=(7, 4))
    for r, trace in enumerate(analysis.walker_traces):
        held = np.where(trace >= 0, trace, np.nan)          # -1: the walker's run had ended (pooled study)
        ax.step(np.arange(len(trace)), held, where="post", lw=0.8, label=f"walker {r}")
    ax.set_xlabel("production cycle")
    ax.set_ylabel("condition held")
    ax.set_title("walker traces through the ladder")
    if len(analysis.walker_traces) <= 10:
        ax.legend(fontsize="small", ncol=2)
    fig.tight_layout()
    fig.savefig(out / "walker-traces.png", dpi=120)
    plt.close(fig)
    pairs = [(i, j, rate) for i, j, rate, *_ in analysis.verdicts.acceptance]
    fig, ax = plt.subplots(figsize=(6, 4))
    ax.bar([f"{i}–{j}" for i, j, _ in pairs], [rate for *_, rate in pairs], color="tab:green")
    ax.set_xlabel("neighbouring conditions")
    ax.set_ylabel("swap acceptance (fraction)")
    ax.set_ylim(0, 1)
    fig.tight_layout()
    fig.savefig(out / "swap-acceptance.png", dpi=120)
    plt.close(fig)


def _convergence_series(analysis):
    """(label, unit, row) for each number of the convergence plot and table."""
    names, unit = analysis.basins.names, analysis.energy_unit
    series = [(f"population of {name}", "fraction", i) for i, name in enumerate(names)]
    series += [(f"ΔG {names[0]} → {name}", unit, len(names) + j - 1) for j, name in enumerate(names) if j > 0]
    return series


def _write_convergence(analysis, out):
    c, length = analysis.verdicts.cumulative, analysis.verdicts.production_ps
    rows = [[label, f"{fraction:.2f}", _fmt(fraction * length, 2), _fmt(c.forward[row, j], 5),
             _fmt(c.d_forward[row, j], 5), _fmt(c.reverse[row, j], 5), _fmt(c.d_reverse[row, j], 5)]
            for label, _, row in _convergence_series(analysis) for j, fraction in enumerate(c.fractions)]
    _write_rows(out / "convergence.csv", ["number", "fraction of production", "production used (ps)",
                                          "from the start", "from the start error", "from the end",
                                          "from the end error"], rows)


def _plot_convergence(analysis, out, plt):
    c, length = analysis.verdicts.cumulative, analysis.verdicts.production_ps
    series = _convergence_series(analysis)
    fig, axes = plt.subplots(1, len(series), figsize=(4.2 * len(series), 3.8), squeeze=False)
    t = c.fractions * length
    for ax, (label, unit, row) in zip(axes[0], series):
        for values, errors, colour, what in ((c.forward, c.d_forward, "tab:blue", "first part of production"),
                                             (c.reverse, c.d_reverse, "tab:orange", "last part of production")):
            ax.plot(t, values[row], "o-", ms=3, color=colour, label=what)
            low, high = values[row] - errors[row], values[row] + errors[row]
            if unit == "fraction":          # a population's band stays inside its possible range
                low, high = np.clip(low, 0.0, 1.0), np.clip(high, 0.0, 1.0)
            ax.fill_between(t, low, high, color=colour, alpha=0.2)
        ax.axhline(c.forward[row, -1], color="0.4", lw=0.8, ls="--", label="all of production")
        ax.set_xlabel("production used (ps)")
        ax.set_ylabel(f"{label} ({unit})")
    axes[0][0].legend(fontsize="small", loc="best")
    fig.suptitle("estimates from growing parts of production (± one standard error)", fontsize="medium")
    fig.tight_layout()
    fig.savefig(out / "convergence.png", dpi=120)
    plt.close(fig)
