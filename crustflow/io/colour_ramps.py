"""crustflow's own colour ramps and the rule that picks a ramp and its limits for each variable.

The ramps are straight lines in CIELAB (so equal steps along a ramp are equal colour differences
Delta E*ab), designed here rather than copied from any program:

* ``sequential`` (magnitudes): dark blue-violet (L* 20) to light yellow (L* 94). Lightness rises
  monotonically and the hue runs along the blue-yellow axis, which the common red-green colour
  vision deficiencies keep.
* ``diverging`` (signed rates and components): blue (L* 40) through near-white (L* 96) to orange
  (L* 40), both arms the same length in CIELAB, so ``-v`` and ``+v`` are equally far from the
  centre; blue-orange stays distinguishable under red-green deficiencies.
* ``flag`` categories: light grey for the ordinary value, the diverging ramp's orange end for the
  value that asks for attention, transparent for nodata.

Figures (:mod:`crustflow.figures`) and the GIS style files (:mod:`crustflow.io.styles`) both draw
colours and limits from :func:`colour_scale`, so a map looks the same in a figure and in a GIS.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "RAMPS",
    "ColourScale",
    "colour_scale",
    "flag_categories",
    "lab_to_srgb",
    "srgb_to_lab",
    "ramp_colours",
    "ROBUST_PERCENTILE",
]

#: CIE D65 white point, XYZ with Y = 1 (IEC 61966-2-1:1999, the sRGB standard).
D65_WHITE = np.array([0.9505, 1.0, 1.0890])

#: Linear sRGB from CIE XYZ (IEC 61966-2-1:1999, eq. 5).
XYZ_TO_SRGB = np.array(
    [[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]]
)

#: CIELAB break point delta = 6/29 (CIE 15:2004, section 8.2.1).
LAB_DELTA = 6.0 / 29.0

#: Ramp end points as (L*, C*ab, hue angle in degrees); the ramp is the straight CIELAB line
#: between them (the diverging ramp: two lines meeting at the centre). Project design, checked
#: to stay inside the sRGB gamut (tests/io/test_styles.py).
RAMPS: dict[str, tuple[tuple[float, float, float], ...]] = {
    "sequential": ((20.0, 30.0, 285.0), (94.0, 60.0, 102.0)),
    "diverging": ((40.0, 42.0, 280.0), (96.0, 0.0, 0.0), (40.0, 42.0, 55.0)),
}

#: Percentile of |value| (or of value) used for robust colour limits, so a few extreme cells at a
#: scarp do not wash out the rest. Common practice, no source.
ROBUST_PERCENTILE = 98.0

#: Lightness of the ordinary category of a flag raster (a light grey). Project choice.
FLAG_PLAIN_LIGHTNESS = 86.0

#: Value of each flag variable that asks for attention (drawn in colour). Project choice.
FLAG_ALERT = {"backflow": 1, "thin_channel_warning": 1, "solver_converged": 0}

#: Variables drawn with the diverging ramp (signed quantities centred on zero).
SIGNED = {
    "thickening_rate",
    "uplift_rate",
    "flux_east",
    "flux_north",
    "drive_east",
    "drive_north",
    "mean_velocity_east",
    "mean_velocity_north",
    "upper_wall_drag_east",
    "upper_wall_drag_north",
    "lower_wall_drag_east",
    "lower_wall_drag_north",
}

#: Default normalisation per variable: the flux magnitude spans three or more decades between a
#: plateau's flanks and its scarp, so a log scale shows both. Project choice.
DEFAULT_NORMS = {"flux_magnitude": "log"}

#: Smallest span of a log colour scale, decades: lower limit >= upper / 10**3. Project choice.
LOG_DECADES = 3.0


def _lch_to_lab(lch) -> np.ndarray:
    lightness, chroma, hue = lch
    h = np.deg2rad(hue)
    return np.array([lightness, chroma * np.cos(h), chroma * np.sin(h)])


def lab_to_srgb(lab, *, clip: bool = True) -> np.ndarray:
    """CIELAB (D65) to gamma-encoded sRGB in 0..1.

    Parameters
    ----------
    lab : array_like, shape (..., 3)
        L*, a*, b*.
    clip : bool
        Clip to 0..1 (out-of-gamut colours); False returns the raw values (for gamut checks).

    Returns
    -------
    ndarray, shape (..., 3)

    Notes
    -----
    ``f_y = (L* + 16) / 116``, ``f_x = f_y + a*/500``, ``f_z = f_y - b*/200``;
    ``X/X_n = f_x^3`` if ``f_x > 6/29`` else ``3 (6/29)^2 (f_x - 4/29)`` (likewise Y, Z); linear
    RGB = M XYZ; encoded ``12.92 c`` for ``c <= 0.0031308`` else ``1.055 c^(1/2.4) - 0.055``.

    References
    ----------
    CIE 15:2004, Colorimetry, section 8.2.1. IEC 61966-2-1:1999 (sRGB).
    """
    lab = np.asarray(lab, dtype=float)
    fy = (lab[..., 0] + 16.0) / 116.0
    f = np.stack([fy + lab[..., 1] / 500.0, fy, fy - lab[..., 2] / 200.0], axis=-1)
    xyz = np.where(f > LAB_DELTA, f**3, 3 * LAB_DELTA**2 * (f - 4.0 / 29.0)) * D65_WHITE
    linear = xyz @ XYZ_TO_SRGB.T
    if clip:
        linear = np.clip(linear, 0.0, 1.0)
    signs = np.sign(linear)
    linear = np.abs(linear)
    encoded = np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * linear ** (1 / 2.4) - 0.055)
    return signs * encoded


def srgb_to_lab(rgb) -> np.ndarray:
    """Gamma-encoded sRGB (0..1) to CIELAB (D65); the inverse of :func:`lab_to_srgb`.

    References
    ----------
    CIE 15:2004, section 8.2.1. IEC 61966-2-1:1999.
    """
    rgb = np.asarray(rgb, dtype=float)
    linear = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    xyz = linear @ np.linalg.inv(XYZ_TO_SRGB).T / D65_WHITE
    f = np.where(xyz > LAB_DELTA**3, np.cbrt(xyz), xyz / (3 * LAB_DELTA**2) + 4.0 / 29.0)
    return np.stack(
        [
            116.0 * f[..., 1] - 16.0,
            500.0 * (f[..., 0] - f[..., 1]),
            200.0 * (f[..., 1] - f[..., 2]),
        ],
        axis=-1,
    )


def ramp_colours(ramp: str, n: int = 256) -> np.ndarray:
    """``n`` sRGB colours (0..1, shape (n, 3)) evenly spaced along a ramp of :data:`RAMPS`."""
    if ramp not in RAMPS:
        raise ValueError(f"ramp {ramp!r} is not one of {sorted(RAMPS)}")
    ends = [_lch_to_lab(p) for p in RAMPS[ramp]]
    t = np.linspace(0.0, 1.0, n)[:, None]
    if len(ends) == 2:
        lab = ends[0] + (ends[1] - ends[0]) * t
    else:  # two arms meeting at the centre
        s = 2.0 * t
        lab = np.where(
            s <= 1.0, ends[0] + (ends[1] - ends[0]) * s, ends[1] + (ends[2] - ends[1]) * (s - 1.0)
        )
    return lab_to_srgb(lab)


def hex_colour(rgb) -> str:
    """``#rrggbb`` of an sRGB triple in 0..1."""
    r, g, b = (int(round(float(c) * 255)) for c in rgb[:3])
    return f"#{r:02x}{g:02x}{b:02x}"


@dataclass(frozen=True)
class ColourScale:
    """A ramp with its limits and normalisation: what a figure's colour bar and a GIS style share.

    Attributes
    ----------
    ramp : str
        Key of :data:`RAMPS`.
    vmin, vmax : float
        Limits in the variable's practical unit.
    norm : str
        ``"linear"``, ``"log"`` or ``"power"``.
    gamma : float
        Exponent of the power norm (``value = vmin + (vmax - vmin) * t**(1/gamma)``).
    """

    ramp: str
    vmin: float
    vmax: float
    norm: str = "linear"
    gamma: float = 0.5

    def positions(self, values) -> np.ndarray:
        """Position 0..1 along the ramp of each value."""
        v = np.asarray(values, dtype=float)
        if self.norm == "log":
            lo, hi = np.log10(self.vmin), np.log10(self.vmax)
            with np.errstate(divide="ignore", invalid="ignore"):
                t = (np.log10(np.maximum(v, self.vmin)) - lo) / (hi - lo)
        else:
            t = (v - self.vmin) / (self.vmax - self.vmin)
            if self.norm == "power":
                t = np.clip(t, 0.0, 1.0) ** self.gamma
        return np.clip(t, 0.0, 1.0)

    def stops(self, n: int = 17) -> list[tuple[float, str]]:
        """``n`` (value, ``#rrggbb``) pairs, evenly spaced along the ramp (so a GIS that
        interpolates linearly between them follows a log or power norm closely)."""
        t = np.linspace(0.0, 1.0, n)
        if self.norm == "log":
            values = 10 ** (np.log10(self.vmin) + t * np.log10(self.vmax / self.vmin))
        elif self.norm == "power":
            values = self.vmin + (self.vmax - self.vmin) * t ** (1.0 / self.gamma)
        else:
            values = self.vmin + (self.vmax - self.vmin) * t
        colours = ramp_colours(self.ramp, 256)[np.round(t * 255).astype(int)]
        return [(float(v), hex_colour(c)) for v, c in zip(values, colours, strict=True)]


def colour_scale(name: str, values, *, norm: str | None = None, gamma: float = 0.5) -> ColourScale:
    """The ramp and limits of a variable, from a sample of its values (practical units).

    Parameters
    ----------
    name : str
        Variable name (signed variables of :data:`SIGNED` get the diverging ramp).
    values : array_like
        A sample of the values (NaN ignored), e.g. the decimated copy drawn in the figure.
    norm : {"linear", "log", "power"}, optional
        Normalisation of sequential variables (signed ones are always linear and symmetric);
        default from :data:`DEFAULT_NORMS` (log for the flux magnitude), else linear.
    gamma : float
        Exponent of the power norm.

    Returns
    -------
    ColourScale

    Notes
    -----
    Signed variables: limits ``-m, +m`` with ``m`` the :data:`ROBUST_PERCENTILE` th percentile of
    ``|value|``, so zero sits at the ramp's neutral centre. Sequential: the minimum and the
    maximum; with ``norm = "log"`` the lower limit is the smallest positive value, raised to at
    most :data:`LOG_DECADES` decades below the maximum.
    """
    norm = DEFAULT_NORMS.get(name, "linear") if norm is None else norm
    if norm not in ("linear", "log", "power"):
        raise ValueError(f"norm {norm!r} is not one of linear, log, power")
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if name in SIGNED:
        m = float(np.percentile(np.abs(v), ROBUST_PERCENTILE)) if v.size else 0.0
        m = m if m > 0 else (float(np.abs(v).max()) if v.size and np.abs(v).max() > 0 else 1.0)
        return ColourScale("diverging", -m, m)
    lo, hi = (float(v.min()), float(v.max())) if v.size else (0.0, 1.0)
    if norm == "log":
        positive = v[v > 0]
        hi = hi if hi > 0 else 1.0
        lo = float(positive.min()) if positive.size else hi / 10**LOG_DECADES
        lo = max(lo, hi / 10**LOG_DECADES)
    if hi <= lo:
        hi = lo + (abs(lo) if lo else 1.0)
    return ColourScale("sequential", lo, hi, norm, gamma)


def flag_categories(name: str, meanings: str) -> list[tuple[int, str, str]]:
    """(value, label, ``#rrggbb``) of a flag variable's two categories.

    ``meanings`` is the CF ``flag_meanings`` string (values 0 and 1 in order); the value of
    :data:`FLAG_ALERT` gets the orange end of the diverging ramp, the other a light grey.
    """
    alert = FLAG_ALERT.get(name, 1)
    labels = [m.replace("_", " ") for m in meanings.split()]
    grey = hex_colour(lab_to_srgb([FLAG_PLAIN_LIGHTNESS, 0.0, 0.0]))
    orange = hex_colour(ramp_colours("diverging", 256)[-1])
    return [(k, labels[k], orange if k == alert else grey) for k in (0, 1)]
