"""Reports a user reads: the demo report (Markdown + PNG plots) and the bundle summary of
``rigcast inspect``.

Plots use matplotlib's object API (``Figure`` renders with Agg when saved as PNG), so no global
backend is switched and no window is opened.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

log = logging.getLogger(__name__)

PLOT_CONTROLS = "controls.png"
PLOT_FIT_ERROR = "fit_error.png"
PLOT_LATENCY = "latency.png"
REPORT_NAME = "report.md"


@dataclass(frozen=True)
class RunSummary:
    """What a streamed run came to, as the demo prints it and writes it into its report."""

    frames_sent: int
    frames_solved: int
    corrupt_sent: int
    latency_p50_ms: float
    latency_p99_ms: float
    fit_rms_mean: float
    off_manifold: int
    dropped: int
    stale: int
    rejected: Mapping[str, int] = field(default_factory=dict)
    stage_p50_ms: Mapping[str, float] = field(default_factory=dict)
    stage_p99_ms: Mapping[str, float] = field(default_factory=dict)
    duration_s: float = 0.0
    planted_off: int = 0
    batch_found: int | None = None
    batch_others: int | None = None
    phase_seconds: Mapping[str, float] = field(default_factory=dict)

    @property
    def rejected_total(self) -> int:
        return int(sum(self.rejected.values()))

    def off_manifold_line(self) -> str:
        text = f"off-manifold frames: {self.off_manifold} flagged live"
        if self.planted_off:
            text += f", {self.planted_off} pushed off the manifold in the take"
        if self.batch_found is not None:
            text += (f"; a batch solve of the same take flags {self.batch_found} of them "
                     f"and {self.batch_others} others")
        return text

    def phases_line(self) -> str:
        parts = ", ".join(f"{k} {v:.1f} s" for k, v in self.phase_seconds.items())
        return f"time: {parts}, total {sum(self.phase_seconds.values()):.1f} s"

    def lines(self) -> list[str]:
        """The plain summary lines, each ``label: value``."""
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        return [
            f"frames: {self.frames_sent} sent, {self.frames_solved} solved, "
            f"{self.corrupt_sent} corrupt on purpose, in {self.duration_s:.1f} s",
            f"latency end to end: p50 {self.latency_p50_ms:.3f} ms, "
            f"p99 {self.latency_p99_ms:.3f} ms",
            f"mean fit error: {self.fit_rms_mean:.5f} (RMS, mesh units)",
            self.off_manifold_line(),
            f"dropped: {self.dropped}, stale: {self.stale}",
            f"rejected: {self.rejected_total} ({reasons})",
        ] + ([self.phases_line()] if self.phase_seconds else [])


@dataclass(frozen=True)
class RunRecord:
    """The time series behind the plots.

    frame_times_s: (T,) time of each solved frame from the start of the take.
    controls:      (T, C) published control values.
    off_manifold:  (T,) bool, the server's off-manifold flag per frame.
    fit_times_s:   (M,) times of the fit-error samples.
    fit_rms:       (M,) fit error RMS at those times (mesh units).
    latency_ms:    (N,) end-to-end latencies, send to controls received.
    planted_off_s: (P,) times of frames the take pushed off the manifold on purpose, if known.
    """

    control_names: tuple[str, ...]
    frame_times_s: np.ndarray
    controls: np.ndarray
    off_manifold: np.ndarray
    fit_times_s: np.ndarray
    fit_rms: np.ndarray
    latency_ms: np.ndarray
    planted_off_s: np.ndarray = field(default_factory=lambda: np.zeros(0))


def most_active(controls: np.ndarray, defaults: np.ndarray | None, top: int) -> np.ndarray:
    """Indices of the ``top`` controls that move most.

    controls: (T, C); defaults: (C,) or None (then the per-control median is the rest value).
    returns: (min(top, C),) indices, most active first, by mean absolute deviation from rest.
    """
    if controls.size == 0:
        return np.zeros(0, dtype=np.int64)
    rest = defaults if defaults is not None else np.median(controls, axis=0)
    activity = np.mean(np.abs(controls - rest[None, :]), axis=0)
    return np.argsort(-activity, kind="stable")[: min(top, controls.shape[1])]


@contextmanager
def _figure(path: Path, size: tuple[float, float], title: str, xlabel: str, ylabel: str
            ) -> Iterator[Any]:
    """One titled, labelled axes; saved to ``path`` as PNG when the block ends."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    yield ax
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    fig.tight_layout()
    fig.savefig(path)


def plot_controls(path: Path, record: RunRecord, top: int = 8) -> Path:
    shown = min(top, len(record.control_names))
    with _figure(path, (10, 4.5), f"Solved controls over time (the {shown} most active)",
                 "time (s)", "control value") as ax:
        for i in most_active(record.controls, None, top):
            ax.plot(record.frame_times_s, record.controls[:, i], lw=1.2,
                    label=record.control_names[i])
        if record.controls.size:
            ax.legend(loc="upper right", fontsize=7, ncol=2)
        ax.grid(alpha=0.3)
    return path


def plot_fit_error(path: Path, record: RunRecord) -> Path:
    with _figure(path, (10, 3.5), "Fit error over time (red: frames flagged off-manifold)",
                 "time (s)", "fit error (mesh units)") as ax:
        ax.plot(record.fit_times_s, record.fit_rms, lw=1.0, color="tab:blue",
                label="fit error RMS")
        off_t = record.frame_times_s[record.off_manifold]
        for k, t in enumerate(off_t):
            ax.axvline(float(t), color="tab:red", alpha=0.35, lw=0.8,
                       label="off-manifold frame" if k == 0 else None)
        for k, t in enumerate(record.planted_off_s):
            ax.axvline(float(t), color="tab:orange", ls=":", lw=1.2,
                       label="pushed off the manifold in the take" if k == 0 else None)
        ax.grid(alpha=0.3)
        if record.fit_rms.size or off_t.size or record.planted_off_s.size:
            ax.legend(loc="upper right", fontsize=8)
    return path


def plot_latency(path: Path, record: RunRecord) -> Path:
    with _figure(path, (7, 3.5), "Latency histogram",
                 "end-to-end latency, send to controls received (ms)", "frames") as ax:
        lat = record.latency_ms[np.isfinite(record.latency_ms)]
        if lat.size:
            ax.hist(lat, bins=60, color="tab:green", alpha=0.8)
            for q, style in ((50, "-"), (99, "--")):
                v = float(np.percentile(lat, q))
                ax.axvline(v, color="black", ls=style, lw=1, label=f"p{q} {v:.3f} ms")
            ax.legend(fontsize=8)
    return path


def write_run_report(
    out_dir: str | Path,
    record: RunRecord,
    summary: RunSummary,
    *,
    title: str = "rigcast demo",
    notes: Sequence[str] = (),
) -> Path:
    """Write ``report.md`` and its three plots into ``out_dir``; return the report's path."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    plot_controls(out / PLOT_CONTROLS, record)
    plot_fit_error(out / PLOT_FIT_ERROR, record)
    plot_latency(out / PLOT_LATENCY, record)
    stages = sorted(set(summary.stage_p50_ms) | set(summary.stage_p99_ms))
    md = [f"# {title}", "", *notes, "", "## Summary", ""]
    md += [f"- {line}" for line in summary.lines()]
    if stages:
        md += ["", "## Server stages (last telemetry window)", "", "| stage | p50 ms | p99 ms |",
               "| --- | ---: | ---: |"]
        for s in stages:
            p50 = summary.stage_p50_ms.get(s, float("nan"))
            p99 = summary.stage_p99_ms.get(s, float("nan"))
            md.append(f"| {s} | {p50:.4f} | {p99:.4f} |")
    md += [
        "",
        "## Controls over time",
        "",
        f"![controls]({PLOT_CONTROLS})",
        "",
        "## Fit error over time",
        "",
        "The forward model re-renders the solved controls; the error is measured against the "
        "incoming mesh. Red lines mark frames the server flagged off-manifold; orange dotted "
        "lines the frames the take pushed off the manifold on purpose.",
        "",
        f"![fit error]({PLOT_FIT_ERROR})",
        "",
        "## Latency",
        "",
        f"![latency]({PLOT_LATENCY})",
        "",
    ]
    path = out / REPORT_NAME
    path.write_text("\n".join(md), encoding="utf-8")
    log.info("wrote report %s", path)
    return path


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def bundle_summary(manifest: Mapping[str, Any], *, path: str, size_bytes: int,
                   fingerprint: str, member_sizes: Mapping[str, int]) -> list[str]:
    """The lines ``rigcast inspect`` prints for a bundle's manifest."""
    lines = [
        f"bundle: {path}",
        f"name: {manifest.get('name', '')}",
        f"fingerprint: {fingerprint}",
        f"format version: {manifest.get('format_version')}",
        f"size: {size_bytes / 1e6:.2f} MB ("
        + ", ".join(f"{k} {v / 1e3:.0f} kB" for k, v in sorted(member_sizes.items()))
        + ")",
        f"vertices: {manifest.get('vertex_count')}, faces: {manifest.get('face_count')}, "
        f"controls: {manifest.get('control_count')}, inverse reads "
        f"{manifest.get('input_count')} vertices, stabilises on {manifest.get('stable_count')}",
    ]
    fps = manifest.get("fingerprint")
    if isinstance(fps, Mapping):
        pairs = ", ".join(f"{k} {v}" for k, v in sorted(fps.items()))
        lines.append(f"source fingerprints: {pairs}")
    training = manifest.get("training")
    if isinstance(training, Mapping) and training:
        lines.append("training:")
        for key, value in sorted(training.items()):
            if not isinstance(value, Mapping | list):
                lines.append(f"  {key}: {_fmt(value)}")
    versions = manifest.get("versions")
    if isinstance(versions, Mapping) and versions:
        lines.append("built with: " + ", ".join(f"{k} {v}" for k, v in sorted(versions.items())))
    lines.append("controls:")
    for c in manifest.get("schema", {}).get("controls", []):
        extra = " ".join(x for x in (c.get("group") and f"group={c['group']}",
                                     c.get("pair") and f"pair={c['pair']}") if x)
        lines.append(
            f"  {c['name']:<24} [{_fmt(float(c['min']))}, {_fmt(float(c['max']))}] "
            f"default {_fmt(float(c.get('default', 0.0)))} {extra}".rstrip()
        )
    return lines


def inspect_bundle(path: str | Path, *, as_json: bool = False) -> str:
    """The text ``rigcast inspect`` prints: a summary, or the manifest as JSON."""
    import json
    import zipfile

    from rigcast.runtime.bundle import load_bundle

    bundle = load_bundle(path)
    if as_json:
        return json.dumps({**bundle.manifest, "bundle_fingerprint": bundle.fingerprint},
                          indent=2, sort_keys=True)
    with zipfile.ZipFile(path) as zf:
        sizes = {info.filename: info.file_size for info in zf.infolist()}
    lines = bundle_summary(bundle.manifest, path=str(path), size_bytes=Path(path).stat().st_size,
                           fingerprint=bundle.fingerprint, member_sizes=sizes)
    return "\n".join(lines)


def build_summary(result: Any) -> list[str]:
    """The lines ``rigcast build`` prints for an ``export.bundling.build.BuildResult``."""
    fwd, inv = result.forward, result.inverse
    timings = ", ".join(f"{k} {v:.1f} s" for k, v in result.timings.items())
    how = "reused from the cache" if result.cached else f"built in {result.seconds:.1f} s"
    return [
        f"bundle: {result.bundle_path} ({how}; key {result.key})",
        f"forward model: mean vertex error {fwd.mean_err:.5f} ({fwd.mean_err_pct_diag:.3f}% of "
        f"the bounding-box diagonal), max {fwd.max_err:.5f} on {fwd.holdout_count} held-out poses",
        f"inverse network ({inv.mode}): mean vertex error {inv.mean_err:.5f} "
        f"({inv.mean_err_pct_diag:.3f}% of diagonal) after {inv.steps} steps",
        f"check through the real rig: mean vertex error {result.check_mean_err:.5f} "
        f"({result.check_mean_err_pct_diag:.3f}% of diagonal)",
        *_reference_lines(getattr(result, "reference", None)),
        f"stages: {timings}" if timings else "stages: -",
    ]


def _reference_lines(ref: Any) -> list[str]:
    """The build's self-check beside bounded linear least squares, and its warnings."""
    if not isinstance(ref, dict):
        return []
    lines = [
        f"the solve as served ({'with' if ref.get('stabilised') else 'without'} stabilisation) on "
        f"{ref.get('poses')} held-out poses: mean {ref['rig_mean_err']:.5g}, max "
        f"{ref['rig_max_err']:.5g}; bounded linear least squares: mean {ref['lsq_mean_err']:.5g}, "
        f"max {ref['lsq_max_err']:.5g}",
    ]
    if ref.get("curvature") == "step":
        lines.append("refinement: Gauss-Newton at each frame's current controls (it lowered the "
                     "held-out error by 10 % or more against the fixed matrix)")
    unrec = ref.get("unrecoverable") or []
    lines.append(f"controls recovered alone at 25-100% of their range: "
                 f"{ref.get('recoverable_controls')} of {ref.get('recoverable_controls', 0) + len(unrec)}")
    for item in unrec:
        lines.append(f"  not recoverable: {item['control']}: {item['reason']}")
    if ref.get("worse_than_reference"):
        lines.append("warning: the bundle's solve is less accurate than bounded linear least "
                     "squares on the held-out poses; rebuild with more samples or steps")
    if ref.get("lost_controls"):
        lines.append(f"warning: {len(ref['lost_controls'])} control(s) cannot be recovered: "
                     f"{', '.join(ref['lost_controls'])}")
    for item in ref.get("dead_outputs") or []:
        lines.append(f"warning: the network alone never moves {item['control']} (it moves "
                     f"{100 * item['spread_of_range']:.2g}% of its range, logit "
                     f"{item['median_logit']:.3g}); the refinement may hide it; rebuild")
    return lines


def write_build_report(out_dir: str | Path, result: Any) -> Path:
    """``report.md`` and ``loss.png`` (the inverse's training loss) for a build."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    curve = np.asarray(getattr(result.inverse, "loss_curve", ()) or (), dtype=np.float64)
    md = ["# rigcast build", "", *[f"- {line}" for line in build_summary(result)], ""]
    if curve.size:
        with _figure(out / "loss.png", (7, 3.5), "Inverse network training loss",
                     "logged step", "mesh-space loss") as ax:
            ax.semilogy(np.arange(curve.size), np.maximum(curve, 1e-12))
            ax.grid(alpha=0.3)
        md += ["## Training loss", "", "![loss](loss.png)", ""]
    path = out / REPORT_NAME
    path.write_text("\n".join(md), encoding="utf-8")
    return path
