"""The comparison report: ``results.csv``, ``results.json`` and an ``index.html`` that opens offline.

The page holds the ranked table, side-by-side crops (noisy, clean when present, each method, and each method's
residual times a stated gain) at the most detailed region and at each region of interest, a quality-versus-speed
plot drawn as inline SVG, the removed-structure and added-edge maps, and the caution for medical and
safety-critical use. Images are PNG files in ``images/`` referenced by relative paths; nothing loads from the
network.

The whole folder is written under a temporary name beside the target and renamed into place when complete.
"""
from __future__ import annotations

import csv
import html
import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image

from grainwright.inference.common.atomic import atomic_folder, write_json_atomic
from grainwright.inference.common.errors import InputError
from grainwright.inference.evaluation.detail import STRUCTURED_THRESHOLD
from grainwright.inference.evaluation.svgplot import log_scatter_svg

CAUTION = (
    "Denoising can remove exactly the detail that matters: a hairline crack, a pore, a lesion. On medical or "
    "safety-critical images, denoised output is an aid for viewing and screening, not a substitute for the "
    "original image or for qualified review. Keep the originals, and follow local regulations and licensed "
    "practice."
)

# Crops are enlarged (nearest neighbour) to at least this many pixels on their longer side.
CROP_DISPLAY = 160
# Maps are reduced to at most this many pixels on their longer side.
MAP_DISPLAY = 320


@dataclass(frozen=True)
class Column:
    """One column of a table: the key in a row dict, its heading, and how to print it."""

    key: str
    label: str
    digits: int | None = 2  # None: print as text


@dataclass
class CropSet:
    """Crops of one region of one image, all ``(h, w, C)`` in the working range."""

    title: str
    box: tuple[int, int, int, int]
    noisy: np.ndarray
    clean: np.ndarray | None
    outputs: dict[str, np.ndarray]


@dataclass
class ImagePanels:
    """Everything the page shows for one image."""

    name: str
    sigma: float  # noise standard deviation of the channel-averaged image, working units
    crops: list[CropSet]
    background: np.ndarray  # (H, W) channel-averaged noisy image, for the map overlays
    structure_maps: dict[str, np.ndarray] = field(default_factory=dict)  # method -> (H, W) correlation excess
    added_maps: dict[str, np.ndarray] = field(default_factory=dict)  # method -> (H, W) bool


@dataclass
class ReportContent:
    """What :func:`write_report` writes.

    ``ranking`` is one row per method (already ordered), ``rows`` one row per image and method; ``details``
    one row per image, region and method. ``settings`` and ``findings`` go into results.json as they are and onto
    the page as short lists.
    """

    title: str
    settings: dict[str, Any]
    findings: list[str]
    ranking_columns: list[Column]
    ranking: list[dict[str, Any]]
    row_columns: list[Column]
    rows: list[dict[str, Any]]
    detail_columns: list[Column]
    details: list[dict[str, Any]]
    plot_quality_key: str
    plot_quality_label: str
    panels: list[ImagePanels]
    notes: list[str] = field(default_factory=list)
    size_plot: str | None = None  # SVG: quality versus time per frame of the model sizes tried


def write_report(out_dir: str | Path, content: ReportContent, *, overwrite: bool = False) -> Path:
    """Write the report folder atomically: everything goes to a temporary sibling folder first.

    Raises ``InputError`` when ``out_dir`` exists and is not empty, unless ``overwrite``.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())) and not overwrite:
        raise InputError(out_dir, "report folder exists and is not empty (not overwritten without --overwrite)")
    with atomic_folder(out_dir, replace_existing=overwrite) as staging:
        (staging / "images").mkdir()
        _write_csv(staging / "results.csv", content)
        write_json_atomic(staging / "results.json", _json_document(content), default=_plain)
        (staging / "index.html").write_text(_html_page(content, staging / "images"), "utf-8")
    return out_dir


# ----------------------------------------------------------------------------------------------- data files
def _plain(value: Any) -> Any:
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


def _finite_or_none(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


def _json_document(content: ReportContent) -> dict[str, Any]:
    def clean(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{k: _finite_or_none(v) for k, v in row.items()} for row in rows]

    return {
        "title": content.title,
        "caution": CAUTION,
        "settings": content.settings,
        "findings": content.findings,
        "notes": content.notes,
        "ranking": clean(content.ranking),
        "per_image": clean(content.rows),
        "regions": clean(content.details),
    }


def _write_csv(path: Path, content: ReportContent) -> None:
    keys = [column.key for column in content.row_columns]
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(keys)
        for row in content.rows:
            writer.writerow(["" if row.get(k) is None else row.get(k) for k in keys])


# --------------------------------------------------------------------------------------------------- images
def _to_rgb8(image: np.ndarray, low: float, high: float) -> np.ndarray:
    """Working-range ``(h, w, C)`` -> uint8 RGB by a fixed display window (3 channels shown as colour)."""
    image = np.asarray(image, dtype=np.float64)
    if image.ndim == 2:
        image = image[:, :, None]
    if image.shape[2] == 3:
        shown = image
    else:
        shown = np.repeat(image.mean(axis=2, keepdims=True), 3, axis=2)
    scaled = (shown - low) / max(high - low, 1e-12)
    return (np.clip(scaled, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)


def _save_png(path: Path, rgb: np.ndarray, *, enlarge_to: int | None = None, reduce_to: int | None = None) -> None:
    picture = Image.fromarray(rgb)
    longest = max(picture.size)
    if enlarge_to and longest < enlarge_to:
        factor = max(1, enlarge_to // longest)
        picture = picture.resize((picture.width * factor, picture.height * factor), Image.NEAREST)
    if reduce_to and longest > reduce_to:
        factor = reduce_to / longest
        picture = picture.resize((max(1, round(picture.width * factor)), max(1, round(picture.height * factor))),
                                 Image.BILINEAR)
    buffer = io.BytesIO()
    picture.save(buffer, format="PNG")
    path.write_bytes(buffer.getvalue())


def _slug(text: str) -> str:
    kept = "".join(c if c.isalnum() or c in "-_" else "-" for c in text)
    return "-".join(part for part in kept.split("-") if part)[:60] or "item"


def _structure_overlay(background: np.ndarray, structure: np.ndarray, added: np.ndarray | None) -> np.ndarray:
    """Gray image, removed structure in magenta (stronger = more saturated), added edges in green."""
    low, high = np.percentile(background, [0.5, 99.5])
    gray = np.clip((background - low) / max(high - low, 1e-12), 0, 1) * 0.6
    rgb = np.repeat(gray[:, :, None], 3, axis=2)
    # Only what stands out from noise (the summary's threshold) is coloured, fully from a correlation of 0.8.
    strength = np.clip((structure - STRUCTURED_THRESHOLD) / (0.8 - STRUCTURED_THRESHOLD), 0.0, 1.0)[:, :, None]
    rgb = rgb * (1 - strength) + strength * np.array([1.0, 0.1, 0.8])
    if added is not None:
        rgb[added] = [0.1, 1.0, 0.2]
    return (np.clip(rgb, 0, 1) * 255 + 0.5).astype(np.uint8)


# ------------------------------------------------------------------------------------------------------ html
def _format(value: Any, digits: int | None) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float, np.floating, np.integer)) and digits is not None:
        value = float(value)
        if math.isnan(value):
            return "–"
        if math.isinf(value) or abs(value) >= 1e6:
            return "very large" if value > 0 else "very small"
        return f"{value:.{digits}f}"
    return html.escape(str(value))


def _table(columns: list[Column], rows: list[dict[str, Any]], css: str = "") -> str:
    head = "".join(f"<th>{html.escape(c.label)}</th>" for c in columns)
    body = "".join(
        "<tr>" + "".join(f"<td>{_format(row.get(c.key), c.digits)}</td>" for c in columns) + "</tr>" for row in rows
    )
    return f'<table class="{css}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def quality_speed_svg(points: list[tuple[str, float, float]], quality_label: str) -> str:
    """Inline SVG scatter: seconds per megapixel (log axis) against a quality figure, one labelled dot each."""
    return log_scatter_svg(points, "seconds per megapixel (log scale; faster to the left)", quality_label,
                           aria_label="quality versus speed")


STYLE = """
body { font-family: sans-serif; margin: 24px; color: #222; max-width: 1400px; }
table { border-collapse: collapse; margin: 8px 0 20px; font-size: 13px; }
th, td { border: 1px solid #ccc; padding: 3px 8px; text-align: right; }
th { background: #eee; } td:first-child, th:first-child { text-align: left; }
.caution { border: 2px solid #b35c00; background: #fff4e5; padding: 10px 14px; margin: 12px 0; }
figure { display: inline-block; margin: 4px; text-align: center; font-size: 12px; vertical-align: top; }
figure img { image-rendering: pixelated; border: 1px solid #999; }
.strip { white-space: nowrap; overflow-x: auto; }
"""


def _html_page(content: ReportContent, image_dir: Path) -> str:
    out: list[str] = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(content.title)}</title><style>{STYLE}</style></head><body>",
        f"<h1>{html.escape(content.title)}</h1>",
        f"<div class='caution'><strong>Caution.</strong> {html.escape(CAUTION)}</div>",
        "<h2>Settings</h2><ul>",
    ]
    out += [f"<li>{html.escape(str(k))}: {html.escape(str(v))}</li>" for k, v in content.settings.items()]
    out.append("</ul>")
    if content.findings:
        out.append("<h2>Findings</h2><ul>")
        out += [f"<li>{html.escape(text)}</li>" for text in content.findings]
        out.append("</ul>")
    out.append("<h2>Ranking</h2>")
    out.append(_table(content.ranking_columns, content.ranking))
    if content.notes:
        out.append("<ul>" + "".join(f"<li>{html.escape(n)}</li>" for n in content.notes) + "</ul>")
    out.append("<h2>Quality versus speed</h2>")
    points = [(row["method"], row.get("seconds_per_megapixel") or math.nan, row.get(content.plot_quality_key))
              for row in content.ranking if row.get(content.plot_quality_key) is not None]
    out.append(quality_speed_svg(points, content.plot_quality_label))
    if content.size_plot:
        out.append("<h2>Model sizes tried</h2><p>Mean PSNR of each size in the recorded size search against its "
                   "predicted time per frame on the profiled machine; the chosen size is ringed.</p>")
        out.append(content.size_plot)
    if content.details:
        out.append("<h2>Detail retention in regions of interest</h2>")
        out.append("<p>Contrast retention: (feature mean - background mean) in the output divided by the same "
                   "in the noisy input; 1.0 means the feature's contrast survived, 0.5 that half of it was wiped "
                   "out. Contrast-to-noise ratio rises whenever noise drops, even when the feature blurs, so it is "
                   "shown beside retention, never alone.</p>")
        out.append(_table(content.detail_columns, content.details))
    out.append("<h2>Per image</h2>")
    out.append(_table(content.row_columns, content.rows))
    for image_index, panels in enumerate(content.panels):
        out.append(f"<h2>{html.escape(panels.name)}</h2>")
        out += _crop_section(panels, image_index, image_dir)
        out += _map_section(panels, image_index, image_dir)
    out.append("</body></html>")
    return "\n".join(out)


def _figure(image_dir: Path, file_name: str, rgb: np.ndarray, caption: str, **size: int) -> str:
    _save_png(image_dir / file_name, rgb, **size)
    return (f"<figure><img src='images/{html.escape(file_name)}' alt='{html.escape(caption)}'>"
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def _crop_section(panels: ImagePanels, image_index: int, image_dir: Path) -> list[str]:
    out = []
    gain = 0.5 / (4.0 * max(panels.sigma, 1e-6))  # +-4 noise sigmas of residual fill the display range
    for crop_index, crop in enumerate(panels.crops):
        low, high = (float(v) for v in np.percentile(crop.noisy, [0.5, 99.5]))
        if crop.clean is not None:
            low, high = min(low, float(crop.clean.min())), max(high, float(crop.clean.max()))
        x, y, w, h = crop.box
        out.append(f"<h3>{html.escape(crop.title)} (x {x}, y {y}, {w} x {h} px)</h3><div class='strip'>")
        stem = f"{image_index:03d}-{crop_index:02d}"
        out.append(_figure(image_dir, f"{stem}-noisy.png", _to_rgb8(crop.noisy, low, high), "noisy",
                           enlarge_to=CROP_DISPLAY))
        if crop.clean is not None:
            out.append(_figure(image_dir, f"{stem}-clean.png", _to_rgb8(crop.clean, low, high), "clean",
                               enlarge_to=CROP_DISPLAY))
        for method_index, (method, output) in enumerate(crop.outputs.items()):
            out.append(_figure(image_dir, f"{stem}-m{method_index:02d}-{_slug(method)}.png",
                               _to_rgb8(output, low, high), method, enlarge_to=CROP_DISPLAY))
        out.append("</div><div class='strip'>")
        for method_index, (method, output) in enumerate(crop.outputs.items()):
            residual = 0.5 + gain * (crop.noisy - output)
            out.append(_figure(image_dir, f"{stem}-m{method_index:02d}-{_slug(method)}-residual.png",
                               _to_rgb8(residual, 0.0, 1.0), f"{method}: residual x {gain:.3g}",
                               enlarge_to=CROP_DISPLAY))
        out.append("</div>")
    return out


def _map_section(panels: ImagePanels, image_index: int, image_dir: Path) -> list[str]:
    if not panels.structure_maps:
        return []
    out = ["<h3>Removed structure (magenta) and added edges (green)</h3>",
           "<p>Magenta: where the content a method removed follows the image (local correlation of the residual "
           "with a smoothed copy of the noisy image, above what noise alone gives) rather than looking like noise. Green: edges in the output "
           "that a smoothed copy of the noisy input does not have.</p><div class='strip'>"]
    for method_index, (method, structure) in enumerate(panels.structure_maps.items()):
        overlay = _structure_overlay(panels.background, structure, panels.added_maps.get(method))
        out.append(_figure(image_dir, f"{image_index:03d}-map-m{method_index:02d}-{_slug(method)}.png", overlay,
                           method, enlarge_to=MAP_DISPLAY // 2, reduce_to=MAP_DISPLAY))
    out.append("</div>")
    return out
