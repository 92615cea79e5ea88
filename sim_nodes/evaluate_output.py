"""Writing an evaluation report (:func:`sim_nodes.evaluate.evaluate`): JSON, CSV, PNG plots, a text summary.

Files written into the output folder:

``evaluate.json``
    the report itself (README "Evaluating rules" documents its fields);
``evaluate.csv``
    the curves in long form, one point per row: ``rule,k,series,x,y,lo,hi`` where ``series`` is
    ``roc_mc`` / ``roc_analytic`` (x = Pf, y = Pd), ``falsifiers_mc`` / ``falsifiers_analytic``
    (x = number of falsifiers, y = Pd at the target Pf; lo, hi = its 95 % interval), ``calibration``
    (x = mean stated P(occupied) in a bin, y = fraction occupied) and ``optimal_k_mc`` / ``optimal_k_analytic``
    (x = k, y = Pd at the target Pf);
``roc.png``, ``calibration.png``, ``falsifiers.png``, ``optimal_k.png``.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

__all__ = ["write_report", "write_json", "write_csv", "write_plots", "summary_lines"]


def write_json(report, path):
    Path(path).write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")


def _rows(report):
    for r in report["rules"]:
        base = {"rule": r["rule"], "k": "" if r["k"] is None else r["k"]}
        roc = r["roc"]
        for x, y in zip(roc["pf"], roc["pd"]):
            yield {**base, "series": "roc_mc", "x": x, "y": y, "lo": "", "hi": ""}
        if roc["pd_analytic"] is not None:
            for x, y in zip(roc["pf_analytic"], roc["pd_analytic"]):
                yield {**base, "series": "roc_analytic", "x": x, "y": y, "lo": "", "hi": ""}
        fa = r["falsifiers"]
        for i, c in enumerate(fa["count"]):
            lo, hi = fa["ci"][i]
            yield {**base, "series": "falsifiers_mc", "x": c, "y": fa["pd_monte_carlo"][i], "lo": lo, "hi": hi}
            if fa["pd_analytic"] is not None and fa["pd_analytic"][i] is not None:
                yield {**base, "series": "falsifiers_analytic", "x": c, "y": fa["pd_analytic"][i], "lo": "", "hi": ""}
        cal = r["calibration"]
        if cal:
            for x, y in zip(cal["mean_p"], cal["frac_occupied"]):
                if x is not None:
                    yield {**base, "series": "calibration", "x": x, "y": y, "lo": "", "hi": ""}
    ok = report["optimal_k"]
    if ok:
        for i, k in enumerate(ok["k"]):
            yield {"rule": "k_of_n", "k": k, "series": "optimal_k_mc", "x": k, "y": ok["pd_monte_carlo"][i],
                   "lo": "", "hi": ""}
            if ok["pd_analytic"] is not None:
                yield {"rule": "k_of_n", "k": k, "series": "optimal_k_analytic", "x": k,
                       "y": ok["pd_analytic"][i], "lo": "", "hi": ""}


def write_csv(report, path):
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=["rule", "k", "series", "x", "y", "lo", "hi"])
        w.writeheader()
        w.writerows(_rows(report))


def write_plots(report, folder):
    """The four PNG plots (matplotlib, Agg backend: no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    folder = Path(folder)
    title = _title(report)
    ref = report["reference"]
    target = report["target_pf"]

    fig, ax = plt.subplots(figsize=(8, 6))
    for i, r in enumerate(report["rules"]):
        colour = f"C{i % 10}"
        ax.plot(r["roc"]["pf"], r["roc"]["pd"], "-", color=colour, label=f"{r['label']} (Monte Carlo)")
        if r["roc"]["pd_analytic"] is not None:
            ax.plot(r["roc"]["pf_analytic"], r["roc"]["pd_analytic"], "o", color=colour, markersize=3,
                    fillstyle="none", label=f"{r['label']} (analytic)")
    ax.axvline(target, color="grey", linestyle=":", label=f"target Pf {target:g}")
    ax.plot([ref["pf"]], [ref["pd"]], "k*", markersize=12, label=f"802.22 target (Pf {ref['pf']}, Pd {ref['pd']})")
    ax.set_xscale("log")
    ax.set_xlabel("system false-alarm probability Pf (log scale)")
    ax.set_ylabel("system detection probability Pd")
    ax.set_ylim(0, 1.02)
    ax.set_title(f"ROC: {title}", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, ncol=2, loc="lower right")
    fig.tight_layout()
    fig.savefig(folder / "roc.png", dpi=110)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(6.5, 6))
    ax.plot([0, 1], [0, 1], "k--", linewidth=1, label="perfect calibration")
    for i, r in enumerate(report["rules"]):
        cal = r["calibration"]
        if not cal:
            continue
        pts = [(x, y) for x, y in zip(cal["mean_p"], cal["frac_occupied"]) if x is not None]
        if pts:
            xs, ys = zip(*pts)
            ax.plot(xs, ys, "o-", color=f"C{i % 10}", markersize=4, label=f"{r['label']} (ECE {cal['ece']:.3f})")
    ax.set_xlabel("stated P(occupied)")
    ax.set_ylabel("fraction actually occupied")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_title(f"Reliability curve: {title}", fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    fig.tight_layout()
    fig.savefig(folder / "calibration.png", dpi=110)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(7.5, 5.5))
    for i, r in enumerate(report["rules"]):
        fa = r["falsifiers"]
        colour = f"C{i % 10}"
        lo = [c[0] for c in fa["ci"]]
        hi = [c[1] for c in fa["ci"]]
        ax.plot(fa["count"], fa["pd_monte_carlo"], "-o", color=colour, markersize=3, label=f"{r['label']} (MC)")
        ax.fill_between(fa["count"], lo, hi, color=colour, alpha=0.15)
        if fa["pd_analytic"] is not None:
            ax.plot(fa["count"], fa["pd_analytic"], "x", color=colour, label=f"{r['label']} (analytic)")
    ax.axhline(ref["pd"], color="k", linestyle=":", label=f"802.22 Pd {ref['pd']}")
    ax.set_xlabel(f"falsifying nodes (saying '{report['falsify_mode']}'; best-placed nodes first)")
    ax.set_ylabel(f"Pd at target Pf {target:g}")
    ax.set_ylim(0, 1.02)
    ax.set_title(f"Sensitivity to falsifiers: {title}", fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, ncol=2)
    fig.tight_layout()
    fig.savefig(folder / "falsifiers.png", dpi=110)
    plt.close(fig)

    ok = report["optimal_k"]
    if ok:
        fig, ax = plt.subplots(figsize=(6.5, 4.5))
        ax.plot(ok["k"], ok["pd_monte_carlo"], "o-", label="Monte Carlo")
        if ok["pd_analytic"] is not None:
            ax.plot(ok["k"], ok["pd_analytic"], "x", markersize=9, label="binomial (analytic)")
        ax.axvline(ok["best_k"], color="grey", linestyle=":", label=f"best k = {ok['best_k']}")
        ax.set_xlabel("k (votes needed)")
        ax.set_ylabel(f"Pd of k-out-of-n at Pf {target:g}")
        ax.set_title(f"k-out-of-n: {title}", fontsize=10)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=8)
        fig.tight_layout()
        fig.savefig(folder / "optimal_k.png", dpi=110)
        plt.close(fig)


def _title(report):
    s = report["setup"]
    if s.get("source") == "homogeneous":
        return (f"{s['nodes']} nodes, {s['snr_db']:g} dB, N={s['n_samples']}, {s['fading']}, "
                f"{report['trials']} trials")
    return f"{s.get('scenario')} channel {s.get('channel')}, {report['trials']} trials"


def write_report(report, folder):
    """Write evaluate.json, evaluate.csv and the plots into ``folder`` (created); the paths written."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    write_json(report, folder / "evaluate.json")
    write_csv(report, folder / "evaluate.csv")
    write_plots(report, folder)
    return sorted(p.name for p in folder.iterdir() if p.suffix in {".json", ".csv", ".png"})


def _fmt(v, spec=".4f"):
    return "-" if v is None else format(v, spec)


def summary_lines(report):
    """A short text table of the report."""
    ref = report["reference"]
    lines = [f"{_title(report)}; target Pf {report['target_pf']:g}"
             + ("" if report["complete"] else "  (INTERRUPTED: partial results)"),
             f"{'rule':<16} {'Pd (MC)':>8} {'95% CI':>17} {'Pd (exact)':>10} {'Pf (MC)':>8} {'ECE':>6}  "
             f"meets 802.22 (Pd>={ref['pd']} at Pf {ref['pf']})"]
    for r in report["rules"]:
        pd, pf = r["pd_at_target_pf"], r["pf_at_target_pf"]
        ci = f"[{pd['ci'][0]:.4f}, {pd['ci'][1]:.4f}]"
        ece = r["calibration"]["ece"] if r["calibration"] else None
        lines.append(f"{r['label']:<16} {_fmt(pd['monte_carlo']):>8} {ci:>17} {_fmt(pd['analytic']):>10} "
                     f"{_fmt(pf['monte_carlo']):>8} {_fmt(ece, '.3f'):>6}  {r['reference']['meets']}")
    ok = report["optimal_k"]
    if ok:
        lines.append(f"best k for k-out-of-n at Pf {report['target_pf']:g}: {ok['best_k']}"
                     + (f"; Zhang-Mallik-Letaief min-error k at local Pf {report['target_pf']:g}: "
                        f"{ok['zhang_min_error_k_at_local_pf_target']}"
                        if ok["zhang_min_error_k_at_local_pf_target"] is not None else ""))
    return lines
