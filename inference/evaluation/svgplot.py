"""One small inline-SVG chart, drawn by hand so reports stay offline and dependency-free: a scatter of labelled
points with a logarithmic time axis (faster to the left) and a linear quality axis (better higher up)."""
from __future__ import annotations

import html
import math

SVG_NAMESPACE = "http://www.w3.org/2000/svg"


def log_scatter_svg(points: list[tuple[str, float, float]], x_label: str, y_label: str, *, aria_label: str,
                    chosen: str | None = None, marker: float | None = None, marker_label: str = "",
                    standalone: bool = False, width: int = 560, height: int = 320) -> str:
    """``(label, time, quality)`` points; times must be positive and finite (others are left out).

    ``chosen`` rings that point and adds "(chosen)" to its label; ``marker`` draws a dashed vertical line at that
    time with ``marker_label``. ``standalone`` adds the SVG namespace for a file of its own (inline in HTML it is
    not needed).
    """
    points = [(n, t, q) for n, t, q in points if t > 0 and math.isfinite(t) and math.isfinite(q)]
    left, right, top, bottom = 64, 170, 16, 44
    plot_w, plot_h = width - left - right, height - top - bottom
    namespace = f' xmlns="{SVG_NAMESPACE}"' if standalone else ""
    parts = [f'<svg{namespace} width="{width}" height="{height}" role="img" aria-label="{html.escape(aria_label)}">',
             f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="#fafafa" stroke="#888"/>']
    if points:
        times = [t for _, t, _ in points] + ([marker] if marker and marker > 0 else [])
        t_lo, t_hi = math.floor(math.log10(min(times))), math.ceil(math.log10(max(times)))
        t_hi += t_hi == t_lo
        qualities = [q for _, _, q in points]
        pad = max(0.25, 0.1 * (max(qualities) - min(qualities)))
        q_lo, q_hi = min(qualities) - pad, max(qualities) + pad

        def x_of(time: float) -> float:
            return left + (math.log10(time) - t_lo) / (t_hi - t_lo) * plot_w

        def y_of(quality: float) -> float:
            return top + (1 - (quality - q_lo) / (q_hi - q_lo)) * plot_h

        for decade in range(t_lo, t_hi + 1):
            x = x_of(10.0**decade)
            parts.append(f'<line x1="{x:.1f}" y1="{top}" x2="{x:.1f}" y2="{top + plot_h}" stroke="#ddd"/>')
            parts.append(f'<text x="{x:.1f}" y="{top + plot_h + 16}" font-size="11" text-anchor="middle">'
                         f'{10.0**decade:g}</text>')
        for k in range(5):
            quality = q_lo + (q_hi - q_lo) * k / 4
            y = y_of(quality)
            parts.append(f'<line x1="{left}" y1="{y:.1f}" x2="{left + plot_w}" y2="{y:.1f}" stroke="#eee"/>')
            parts.append(f'<text x="{left - 6}" y="{y + 4:.1f}" font-size="11" text-anchor="end">{quality:.2f}</text>')
        if marker and marker > 0:
            x = x_of(marker)
            parts.append(f'<line x1="{x:.1f}" y1="{top}" x2="{x:.1f}" y2="{top + plot_h}" stroke="#b35c00" '
                         'stroke-dasharray="5,4"/>')
            parts.append(f'<text x="{x + 4:.1f}" y="{top + 12}" font-size="11" fill="#b35c00">'
                         f'{html.escape(marker_label)}</text>')
        for name, time, quality in points:
            x, y = x_of(time), y_of(quality)
            parts.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="4" fill="#1f6fb2"/>')
            label = html.escape(name)
            if name == chosen:
                parts.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="9" fill="none" stroke="#b35c00" '
                             'stroke-width="2"/>')
                label += " (chosen)"
            parts.append(f'<text x="{x + 11:.1f}" y="{y + 4:.1f}" font-size="11">{label}</text>')
    parts.append(f'<text x="{left + plot_w / 2:.1f}" y="{height - 8}" font-size="12" text-anchor="middle">'
                 f'{html.escape(x_label)}</text>')
    parts.append(f'<text x="14" y="{top + plot_h / 2:.1f}" font-size="12" text-anchor="middle" '
                 f'transform="rotate(-90 14 {top + plot_h / 2:.1f})">{html.escape(y_label)}</text>')
    parts.append("</svg>")
    return "".join(parts)
