"""Training schemes by name, and the ``auto`` choice from the data layout.

Adding a scheme is adding one file with a :class:`~grainwright.trainer.schemes.base.Scheme` subclass and listing
it in ``SCHEMES`` below (see DEVELOPERS.md, "A training scheme").
"""
from __future__ import annotations

from grainwright.inference.common.errors import ConfigError
from grainwright.trainer.data import LAYOUT_TEXT
from grainwright.trainer.schemes.base import Scheme
from grainwright.trainer.schemes.masked import Masked
from grainwright.trainer.schemes.neighbor2neighbor import Neighbor2Neighbor
from grainwright.trainer.schemes.neighbor2neighbor_stack import Neighbor2NeighborStack
from grainwright.trainer.schemes.noise2noise import Noise2Noise
from grainwright.trainer.schemes.noise2noise_stack import Noise2NoiseStack
from grainwright.trainer.schemes.recorrupted import Recorrupted
from grainwright.trainer.schemes.recorrupted_stack import RecorruptedStack
from grainwright.trainer.schemes.supervised import Supervised
from grainwright.trainer.schemes.sure import Sure

SCHEMES: dict[str, type[Scheme]] = {
    cls.name: cls for cls in (Supervised, Noise2Noise, Masked, Neighbor2Neighbor, Recorrupted, Sure,
                              Neighbor2NeighborStack, Noise2NoiseStack, RecorruptedStack)
}


def scheme_class(name: str) -> type[Scheme]:
    """The scheme registered as ``name``."""
    if name not in SCHEMES:
        raise ConfigError(f"scheme: unknown scheme '{name}' (known: {', '.join(SCHEMES)}, auto)")
    return SCHEMES[name]


# Noise kinds that are Gaussian in the working domain (as is, or after the generalized Anscombe transform): what
# Recorrupted-to-Recorrupted's Gaussian recorruption assumes.
GAUSSIAN_IN_WORKING_DOMAIN = ("gaussian", "poisson", "poisson-gaussian")


def choose_scheme(layout: str, noise_known: bool, noise_estimated: bool, found: str | None = None,
                  known_kind: str | None = None) -> tuple[str, str]:
    """The scheme ``auto`` picks for ``layout``, and why (one sentence).

    ``noise_known``: a noise description was given, of kind ``known_kind``; ``noise_estimated``: the analysis of
    the images found a confident Gaussian or Poisson-Gaussian model; ``found``: what the analysis found, in words,
    for the reason. A description of noise that is not Gaussian in the working domain (gamma speckle, whose log
    is skewed) leads to ``neighbor2neighbor``, as the same noise found by the analysis does: `bench train`'s
    speckle case lost 2.6 dB with ``recorrupted`` given the true looks (docs/benchmarks.md).
    """
    found_layout = LAYOUT_TEXT[layout]
    if layout == "clean-only":
        if not noise_known:
            raise ConfigError(f"found {found_layout} but no noise description: put a noise.toml in the data folder "
                              "or set noise.file (see 'grainwright inspect --save-noise')")
        return "supervised", f"found {found_layout} and a noise description: supervised with fresh synthetic noise"
    if layout == "clean-noisy":
        return "supervised", f"found {found_layout}: supervised on the real pairs"
    if layout in ("noisy-pairs", "noisy-stacks"):
        return "noise2noise", f"found {found_layout}: Noise2Noise"
    if noise_known and known_kind in GAUSSIAN_IN_WORKING_DOMAIN:
        return "recorrupted", f"found {found_layout} and a noise description: recorrupted (every pixel in the loss)"
    if noise_known:
        return "neighbor2neighbor", (f"found {found_layout} and a noise description of {known_kind} noise, which is "
                                     "not Gaussian in the working domain as recorrupted assumes: neighbor2neighbor "
                                     "(needs only pixel-independent, zero-mean noise)")
    analysis = f" (the analysis found {found})" if found else ""
    if noise_estimated:
        return "recorrupted", (f"found {found_layout}; the noise was estimated confidently{analysis}: recorrupted "
                               "(every pixel in the loss)")
    return "neighbor2neighbor", (f"found {found_layout}; no Gaussian or Poisson-Gaussian noise model could be "
                                 f"trusted{analysis}: neighbor2neighbor (needs no noise model)")


def check_scheme_fits(name: str, layout: str) -> None:
    """Stop with an error saying what was found when scheme ``name`` cannot train on ``layout``."""
    cls = scheme_class(name)
    if layout not in cls.layouts:
        fits = [scheme for scheme, c in SCHEMES.items() if layout in c.layouts]
        raise ConfigError(f"scheme '{name}' needs {' or '.join(LAYOUT_TEXT[l] for l in cls.layouts)}, but the data "
                          f"folder holds {LAYOUT_TEXT[layout]}; schemes that fit: {', '.join(fits)}")


def choose_stack_scheme(layout: str, noise: str | None, found: str | None, banding_left: bool,
                        correlation: float | None, limit: float) -> tuple[str, str]:
    """The scheme ``auto`` picks for a multi-frame model, and why (one sentence).

    ``recorrupted-stack`` (every pixel in the loss at full resolution, on consecutive frames) when its rule
    allows it, else ``neighbor2neighbor-stack`` (needs no noise model; never shows the network a target position
    in any frame). The rule: a trusted Gaussian or Poisson-Gaussian noise model (``noise``, in words: given in a
    noise description or fitted confidently; None when there is none), no banding left uncorrected
    (``banding_left``), and the noise correlation between the window's frames measured at most ``limit`` in size
    (``recorrupted.max_frame_correlation``; ``correlation`` is the largest of the offsets, measured on the frames
    in working units, None when the rule failed before it). Correlated noise within the limit is allowed: the
    scheme draws its recorruption with the measured correlation. ``found``: what the noise analysis found, in
    words, for the reason.
    """
    start = f"found {LAYOUT_TEXT[layout]} and a multi-frame model"
    fallback = "neighbor2neighbor-stack (needs no noise model; valid where the scene moves)"
    if noise is None:
        analysis = f" (the analysis found {found})" if found else ""
        return "neighbor2neighbor-stack", (f"{start}; no Gaussian or Poisson-Gaussian noise model could be "
                                           f"trusted{analysis}: {fallback}")
    if banding_left:
        return "neighbor2neighbor-stack", (f"{start}; banding is flagged and left uncorrected (data.fixed_pattern), "
                                           f"which recorrupted-stack would pass on through its target's own row: "
                                           f"{fallback}")
    if correlation is None or abs(correlation) > limit:
        measured = "was not measured" if correlation is None else f"is correlated {correlation:.2f}"
        return "neighbor2neighbor-stack", (f"{start}; the noise of the window's frames {measured} "
                                           f"(recorrupted.max_frame_correlation = {limit:g}), too much to trust the "
                                           f"measured correlation to keep the target's noise out of the "
                                           f"neighbours: {fallback}")
    return "recorrupted-stack", (f"{start}; {noise}, largest noise correlation between the window's "
                                 f"frames {correlation:.2f} (limit {limit:g}): recorrupted-stack, drawing its "
                                 "recorruption with the measured correlation (every pixel in the loss, at full "
                                 "resolution, valid where the scene moves)")
