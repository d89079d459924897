"""The outcome of a comparison in words and tables: the ranking of the methods, the findings and the report's
columns and notes (what :func:`grainwright.inference.evaluation.compare.run_comparison` hands the report writer).

Ranking: by mean PSNR with ground truth; without, by SURE's estimated PSNR to 0.1 dB, then the J-invariant loss.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from grainwright.inference.evaluation.calibration import CALIBRATED_LABEL, GROUND_TRUTH_LABEL
from grainwright.inference.evaluation.compare_inputs import CompareOptions, MethodSpec
from grainwright.inference.evaluation.report import Column, ImagePanels, ReportContent

# Regions whose noisy feature-minus-background contrast is under this many standard errors are too faint for
# their contrast retention (a ratio with that contrast below) to mean much (common practice, no source).
CLEAR_CONTRAST = 3.0


def _mean(values: list[Any]) -> float | None:
    numbers = [float(v) for v in values if v is not None and not (isinstance(v, float) and math.isnan(v))]
    return float(np.mean(numbers)) if numbers else None


def rank_methods(rows: list[dict[str, Any]], specs: list[MethodSpec], ground_truth: bool) -> list[dict[str, Any]]:
    summary = []
    for spec in specs:
        mine = [row for row in rows if row["method"] == spec.label]
        entry = {"method": spec.label, "kind": spec.kind, "parameter_choice": mine[0]["parameter_choice"]}
        for key in ("psnr", "ssim", "ms_ssim", "sure_psnr", "sure_standard_error", "j_invariant_loss",
                    "residual_autocorrelation", "noise_left", "residual_output_correlation", "structured_fraction"):
            entry[key] = _mean([row.get(key) for row in mine])
        total_seconds = sum(row["seconds_per_megapixel"] for row in mine)
        entry["seconds_per_megapixel"] = total_seconds / len(mine)
        entry["added_structure_images"] = sum(bool(row["added_structure"]) for row in mine)
        summary.append(entry)
    by_loss = sorted(summary, key=lambda entry: entry["j_invariant_loss"])
    for position, entry in enumerate(by_loss, 1):
        entry["j_invariant_rank"] = position
    def sure_key(entry: dict[str, Any]) -> tuple[float, float]:
        estimate = entry["sure_psnr"]
        bucket = round(estimate / 0.1) if estimate is not None else -math.inf  # unusable estimates last
        return (-bucket, entry["j_invariant_loss"])

    by_sure = sorted(summary, key=sure_key)
    for position, entry in enumerate(by_sure, 1):
        entry["sure_rank"] = position
    if ground_truth:
        ordered = sorted(summary, key=lambda entry: -entry["psnr"])
    else:
        ordered = by_sure
    for position, entry in enumerate(ordered, 1):
        entry["rank"] = position
    return [{"rank": e.pop("rank"), **e} for e in ordered]


def _clear_of_noise(detail: dict[str, Any]) -> bool:
    """A region whose noisy contrast is at least ``CLEAR_CONTRAST`` standard errors: its retention means something."""
    return math.isfinite(detail["contrast_retention"]) and detail["noisy_contrast_in_standard_errors"] >= CLEAR_CONTRAST


def _add_retention(ranking: list[dict[str, Any]], details: list[dict[str, Any]]) -> None:
    for entry in ranking:
        values = [d["contrast_retention"] for d in details if d["method"] == entry["method"] and _clear_of_noise(d)]
        entry["contrast_retention_mean"] = float(np.mean(values)) if values else None
        entry["contrast_retention_min"] = float(np.min(values)) if values else None


def findings_of(ranking: list[dict[str, Any]], details: list[dict[str, Any]],
                ground_truth: bool) -> list[str]:
    _add_retention(ranking, details)
    best = ranking[0]
    findings = []
    if ground_truth:
        findings.append(f"Best by PSNR against the clean images: {best['method']} ({best['psnr']:.2f} dB; classical "
                        f"parameters {GROUND_TRUTH_LABEL}).")
        classical = [e for e in ranking if e["kind"] == "classical"]
        for entry in (e for e in ranking if e["kind"] == "learned"):
            if classical:
                gain = entry["psnr"] - classical[0]["psnr"]
                findings.append(f"{entry['method']}: {gain:+.2f} dB PSNR against the best classical method "
                                f"({classical[0]['method']}, {GROUND_TRUTH_LABEL}).")
        agree, pairs = _sure_agreement(ranking)
        if pairs:
            findings.append(f"SURE's estimated PSNR orders {agree} of {pairs} method pairs whose true PSNRs differ by "
                            f"1 dB or more as the true PSNR does.")
    else:
        if best["sure_psnr"] is not None:
            findings.append(f"Best by SURE's estimated PSNR (no ground truth): {best['method']} "
                            f"({best['sure_psnr']:.2f} dB estimated).")
        unusable = [e["method"] for e in ranking if e["sure_psnr"] is None]
        if unusable:
            findings.append("SURE gave no usable estimate for " + ", ".join(unusable) + " (output jumps under a "
                            "small change of input, or no pixel clear of clipping); ranked last, by J-invariant "
                            "loss.")
        disagreements = [e["method"] for e in ranking if abs(e["j_invariant_rank"] - e["rank"]) >= 2]
        if disagreements:
            findings.append("The J-invariant loss ranks these methods two or more places away from SURE: "
                            + ", ".join(disagreements) + ".")
    most = max(ranking, key=lambda e: e["structured_fraction"] or 0.0)
    if (most["structured_fraction"] or 0.0) > 0:
        findings.append(f"Removed the most structure: {most['method']} (removed content follows the image over "
                        f"{100 * most['structured_fraction']:.1f}% of the pixels).")
    added = [e["method"] for e in ranking if e["added_structure_images"]]
    findings.append("Added edges absent from the smoothed input: " + (", ".join(added) if added else "none flagged")
                    + ".")
    finite = [d for d in details if _clear_of_noise(d)]
    if len(finite) < len(details):
        faint = len({(d["image"], d["region"]) for d in details if not _clear_of_noise(d)})
        findings.append(f"{faint} region(s) have a noisy contrast under {CLEAR_CONTRAST:g} standard errors: their "
                        "contrast retention is listed but left out of the summaries.")
    if finite:
        worst = min(finite, key=lambda d: d["contrast_retention"])
        findings.append(f"Lowest contrast retention: {worst['method']} at {worst['region']} in {worst['image']} "
                        f"({worst['contrast_retention']:.2f}).")
    return findings


def _sure_agreement(ranking: list[dict[str, Any]]) -> tuple[int, int]:
    agree = pairs = 0
    for i, a in enumerate(ranking):
        for b in ranking[i + 1 :]:
            if a["sure_psnr"] is not None and b["sure_psnr"] is not None and abs(a["psnr"] - b["psnr"]) >= 1.0:
                pairs += 1
                agree += (a["psnr"] > b["psnr"]) == (a["sure_psnr"] > b["sure_psnr"])
    return agree, pairs


def report_content(settings: dict[str, Any], findings: list[str], ranking: list[dict[str, Any]],
                   rows: list[dict[str, Any]], details: list[dict[str, Any]], panels: list[ImagePanels],
                   ground_truth: bool, options: CompareOptions) -> ReportContent:
    quality = [Column("psnr", "PSNR (dB)"), Column("ssim", "SSIM", 3), Column("ms_ssim", "MS-SSIM", 3)] \
        if ground_truth else []
    no_reference = [
        Column("sure_psnr", "SURE estimated PSNR (dB)"),
        Column("j_invariant_loss", "J-invariant loss", 6),
        Column("residual_autocorrelation", "residual autocorrelation", 3),
        Column("noise_left", "noise left", 3),
        Column("residual_output_correlation", "residual-output correlation", 3),
        Column("structured_fraction", "removed-structure share", 4),
    ]
    ranking_columns = [
        Column("rank", "rank", 0), Column("method", "method", None), Column("kind", "kind", None),
        Column("parameter_choice", "parameter choice", None), *quality, *no_reference,
        Column("sure_rank", "rank by SURE", 0), Column("j_invariant_rank", "rank by J-invariant loss", 0),
        Column("contrast_retention_mean", "contrast retention (mean, clear regions)"),
        Column("contrast_retention_min", "contrast retention (lowest, clear regions)"),
        Column("added_structure_images", "images with added edges", 0),
        Column("seconds_per_megapixel", "seconds per megapixel", 3),
    ]
    row_columns = [
        Column("image", "image", None), Column("method", "method", None), Column("kind", "kind", None),
        Column("parameter_choice", "parameter choice", None), Column("parameters", "parameters", None), *quality,
        *no_reference, Column("sure_standard_error", "SURE standard error (dB)", 2),
        Column("sure_domain", "SURE domain", None), Column("sure_pixels_scored", "share of pixels SURE scored", 2),
        Column("added_structure", "added edges", None), Column("added_edge_pixels", "added edge pixels", 0),
        Column("seconds_per_megapixel", "seconds per megapixel", 3),
    ]
    detail_columns = [
        Column("image", "image", None), Column("region", "region", None), Column("method", "method", None),
        Column("parameter_choice", "parameter choice", None), Column("contrast_retention", "contrast retention"),
        Column("cnr_output", "contrast-to-noise (output)"), Column("cnr_noisy", "contrast-to-noise (noisy)"),
        Column("noisy_contrast_in_standard_errors", "noisy contrast / its standard error", 1),
    ]
    notes = [
        f"Classical parameters: {GROUND_TRUTH_LABEL if ground_truth else CALIBRATED_LABEL}"
        + (" (grid search on PSNR against the clean images: not reproducible without them)." if ground_truth
           else " (Batson and Royer 2019)."),
        "Ranking: " + ("mean PSNR against the clean images." if ground_truth else
                       "SURE's estimated PSNR (Monte-Carlo SURE, Ramani, Blu and Unser 2008) to 0.1 dB, then the "
                       "J-invariant loss."),
        "SURE's estimated PSNR depends on the estimated noise level; its standard error (per-image table) is the "
        "part of the error no method can know, the same for every method on an image, so the order is finer "
        "than it. For Poisson-Gaussian noise it is a PSNR in the Anscombe domain: for ranking, not comparable "
        "with the PSNR column.",
        f"J-invariant loss: on a centre crop of {options.tuning_crop} pixels"
        + (", 4 of the 16 pixel grids." if options.quick else ", all 16 pixel grids.")
        + " Lower is better; it is the error of the method made J-invariant (no pixel sees its own noisy value) "
        "plus the noise variance, on average.",
        f"Contrast retention summaries use the regions whose noisy contrast is at least {CLEAR_CONTRAST:g} of its "
        "standard errors (region table, last column); fainter regions are listed but not summarised.",
        "Noise left: MAD noise estimate of the output over that of the input. Residual autocorrelation and "
        "residual-output correlation: near 0 when what was removed looks like noise.",
        "Seconds per megapixel: one run on the whole image on this machine (classical filters single-threaded, "
        "ONNX models with the stated threads); a shared machine makes absolute figures noisy.",
    ]
    if options.quick:
        notes.append("Quick settings: at most three points of each parameter grid, small crops.")
    return ReportContent(
        title="Denoiser comparison",
        settings=settings,
        findings=findings,
        ranking_columns=ranking_columns,
        ranking=ranking,
        row_columns=row_columns,
        rows=rows,
        detail_columns=detail_columns,
        details=details,
        plot_quality_key="psnr" if ground_truth else "sure_psnr",
        plot_quality_label="PSNR (dB)" if ground_truth else "SURE estimated PSNR (dB)",
        panels=panels,
        notes=notes,
        size_plot=options.size_plot,
    )
