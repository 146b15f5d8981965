"""Independent numpy implementations of the thermal models and the diurnal cycle, written from
the published equations and the table in docs/methods.md (not from kalends' code), for the
reference and integration checks.

Sources (see docs/methods.md):
  Parton, W.J. & Logan, J.A. (1981), Agric. Meteorol. 23:205-216 (a, b, c of Table 1).
  Cooper, P.I. (1969), Solar Energy 12:333 (declination).
  Mordecai, E.A. et al. (2013), Ecol. Lett. 16:22-30 (trait fits of R0(T)).
  Detinova (1962), Macdonald (1957): degree-days of sporogony; Martens (1997): daily survival.
  Bayoh, M.N. & Lindsay, S.W. (2003), Bull. Entomol. Res. 93:375: 18-34 C.
"""

import functools

import numpy as np
from scipy import optimize

PARTON_LOGAN = (1.86, 2.20, -0.17)  # a, b, c: air at 150 cm, Parton & Logan (1981) Table 1

# Mordecai et al. (2013) trait fits, as listed in issue #5 and docs/methods.md.
BRIERE = {"a": (2.03e-4, 11.7, 42.3), "PDR": (1.11e-4, 14.7, 34.4), "MDR": (1.11e-4, 14.7, 34.0)}
QUADRATIC = {"bc": (-0.54, 25.2, -206.0), "p": (-0.000828, 0.0367, 0.522),
             "EFD": (-0.153, 8.61, -97.7), "pEA": (-0.00924, 0.453, -4.77)}
DEGREE_DAYS = {"falciparum": (111.0, 16.0), "vivax": (105.0, 14.5)}  # Detinova 1962
MARTENS = (-4.4, 1.31, -0.03)  # Martens 1997: L(T) = -4.4 + 1.31 T - 0.03 T^2
WINDOW = (18.0, 34.0)  # Bayoh & Lindsay 2003


def briere(coef, t):
    c, t0, tm = coef
    t = np.asarray(t, dtype=np.float64)
    inside = (t > t0) & (t < tm)
    return np.where(inside, c * t * (t - t0) * np.sqrt(np.clip(tm - t, 0, None)), 0.0)


def quadratic(coef, t):
    q2, q1, q0 = coef
    t = np.asarray(t, dtype=np.float64)
    return np.clip(q2 * t * t + q1 * t + q0, 0, None)


def r0_unscaled(t):
    t = np.atleast_1d(np.asarray(t, dtype=np.float64))
    a = briere(BRIERE["a"], t)
    pdr = briere(BRIERE["PDR"], t)
    mdr = briere(BRIERE["MDR"], t)
    bc = quadratic(QUADRATIC["bc"], t)
    p = quadratic(QUADRATIC["p"], t)
    efd = quadratic(QUADRATIC["EFD"], t)
    pea = quadratic(QUADRATIC["pEA"], t)
    ok = (a > 0) & (bc > 0) & (p > 0) & (p < 1) & (pdr > 0) & (efd > 0) & (pea > 0) & (mdr > 0)
    out = np.zeros_like(t)
    mu = -np.log(p[ok])
    out[ok] = np.sqrt(a[ok] ** 2 * bc[ok] * np.exp(-mu / pdr[ok]) * efd[ok] * pea[ok] * mdr[ok]
                      / mu ** 3)
    return out


def lifespan(t):
    l0, l1, l2 = MARTENS
    return l0 + l1 * t + l2 * t * t


def martens_survival(t):
    t = np.asarray(t, dtype=np.float64)
    L = lifespan(t)
    with np.errstate(divide="ignore"):
        return np.where(L > 0, np.exp(-1.0 / np.where(L > 0, L, 1.0)), 0.0)


def degree_day_unscaled(t, parasite="falciparum"):
    dd, tmin = DEGREE_DAYS[parasite]
    t = np.atleast_1d(np.asarray(t, dtype=np.float64))
    L = lifespan(t)
    ok = (t > tmin) & (L > 0)
    out = np.zeros_like(t)
    n = dd / (t[ok] - tmin)
    out[ok] = martens_survival(t[ok]) ** n
    return out


def _maximum(f):
    grid = np.arange(-20, 60, 0.01)
    values = f(grid)
    t0 = grid[np.argmax(values)]
    res = optimize.minimize_scalar(lambda x: -f(np.array([x]))[0], bounds=(t0 - 0.02, t0 + 0.02),
                                   method="bounded", options={"xatol": 1e-11})
    return res.x, max(-res.fun, values.max())


@functools.lru_cache(maxsize=None)
def _model_maximum(model, parasite):
    if model == "r0-2013":
        return _maximum(r0_unscaled)
    return _maximum(lambda x: degree_day_unscaled(x, parasite))


def relative(model, t, parasite="falciparum", window=WINDOW):
    t = np.atleast_1d(np.asarray(t, dtype=np.float64))
    if model == "r0-2013":
        return r0_unscaled(t) / _model_maximum(model, "falciparum")[1]
    if model == "degree-day":
        return degree_day_unscaled(t, parasite) / _model_maximum(model, parasite)[1]
    if model == "window":
        return np.where(np.isnan(t), np.nan, ((t >= window[0]) & (t <= window[1])).astype(float))
    raise ValueError(model)


def optimum(model, parasite="falciparum"):
    return _model_maximum(model, "falciparum" if model == "r0-2013" else parasite)[0]


# ------------------------------------------------------------------------------- diurnal

def sun(lat, doy):
    """Sunrise, sunset, day length (hours, local solar time): Cooper's declination, geometric."""
    decl = np.radians(23.45) * np.sin(2 * np.pi * (284 + np.asarray(doy, dtype=np.float64)) / 365.0)
    phi = np.radians(np.clip(lat, -89.9, 89.9))
    y = 24 / np.pi * np.arccos(np.clip(-np.tan(phi) * np.tan(decl), -1, 1))
    y = np.clip(y, 1, 23)
    return 12 - y / 2, 12 + y / 2, y


def parton_logan(t, tmin, tmax, sunrise, day_length, prev_tmin, prev_tmax, prev_sunrise,
                 prev_day_length, next_tmin, next_sunrise, params=PARTON_LOGAN):
    """Temperature at local solar hour t in [0, 24] of a day, vectorised over everything.
    Night decay over the whole time from sunset to the next minimum, normalised to end at it
    (docs/methods.md)."""
    a, b, c = params
    t = np.asarray(t, dtype=np.float64)

    def day_curve(lo, hi, rise, length, at):
        return lo + (hi - lo) * np.sin(np.pi * (at - (rise + c)) / (length + 2 * a))

    def night(ts, nxt, n, total):
        x = n / total
        return nxt + (ts - nxt) * (np.exp(-b * x) - np.exp(-b)) / (1 - np.exp(-b))

    sunset = sunrise + day_length
    prev_sunset = prev_sunrise + prev_day_length
    tn = sunrise + c
    before = night(day_curve(prev_tmin, prev_tmax, prev_sunrise, prev_day_length, prev_sunset),
                   tmin, t - (prev_sunset - 24), tn - (prev_sunset - 24))
    during = day_curve(tmin, tmax, sunrise, day_length, t)
    after = night(day_curve(tmin, tmax, sunrise, day_length, sunset), next_tmin, t - sunset,
                  next_sunrise + c + 24 - sunset)
    return np.where(t < tn, before, np.where(t <= sunset, during, after))


def shape(t, sunrise, day_length, params=PARTON_LOGAN):
    """The curve of a unit day (0..1) with identical neighbours."""
    return parton_logan(t, 0.0, 1.0, sunrise, day_length, 0.0, 1.0, sunrise, day_length, 0.0,
                        sunrise, params)


def extremes_from_samples(day_value, day_hour, night_value, night_hour, sunrise, day_length,
                          params=PARTON_LOGAN):
    wd = shape(day_hour, sunrise, day_length, params)
    wn = shape(night_hour, sunrise, day_length, params)
    rng = (day_value - night_value) / (wd - wn)
    tmin = night_value - rng * wn
    flat = ~((day_value > night_value) & (wd > wn))
    mean = (day_value + night_value) / 2
    return np.where(flat, mean, tmin), np.where(flat, mean, tmin + rng)
