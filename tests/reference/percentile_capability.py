"""Reference values for the percentile method of capability (tests/published.rs).

Generates two samples, rounds them to the digits pasted into the test, and fits normal,
lognormal, two-parameter Weibull and Box-Cox models to the rounded readings by maximum
likelihood with scipy; prints the parameters, the 0.135 %, 50 % and 99.865 % quantiles, the
Anderson-Darling statistic of each fit (the formula applied to scipy's CDF) and the ppm beyond
the specification. Run: python3 tests/reference/percentile_capability.py
"""
import numpy as np
from scipy import optimize, stats

rng = np.random.default_rng(2026)
samples = {
    "skewed_right": np.round(rng.lognormal(mean=np.log(0.8), sigma=0.35, size=60), 4),
    "weibull_like": np.round(stats.weibull_min.rvs(2.2, scale=12.0, size=60, random_state=rng), 3),
}
P = [0.00135, 0.5, 0.99865]


def ad(x, cdf, sf):
    x = np.sort(x)
    n = len(x)
    i = np.arange(1, n + 1)
    lo = np.log(np.maximum(cdf(x), 1e-300))
    hi = np.log(np.maximum(sf(x[::-1]), 1e-300))
    return -n - np.sum((2 * i - 1) * (lo + hi)) / n


for name, x in samples.items():
    print(f"== {name} (n={len(x)})")
    print("data:", ", ".join(repr(float(v)) for v in x))
    mu, sd = stats.norm.fit(x)
    s, _, scale = stats.lognorm.fit(x, floc=0)
    c_fit, _, _ = stats.weibull_min.fit(x, floc=0)
    # scipy's generic fit stops at its optimizer's tolerance (about 1e-5 relative here); the
    # maximum of the likelihood itself solves the shape equation, found to machine precision
    # with scipy's root finder and confirmed by the log-likelihood being no lower.
    lx = np.log(x)
    g = lambda k: np.sum(x**k * lx) / np.sum(x**k) - 1 / k - lx.mean()
    c = optimize.brentq(g, 0.05, 50, xtol=1e-15, rtol=1e-15)
    wscale = np.mean(x**c) ** (1 / c)
    ll = lambda k, sc: np.sum(stats.weibull_min.logpdf(x, k, scale=sc))
    _, _, sc_fit = stats.weibull_min.fit(x, floc=0)
    print("weibull: scipy fit shape", float(c_fit), "loglik", float(ll(c_fit, sc_fit)),
          "; likelihood equation shape", float(c), "loglik", float(ll(c, wscale)))
    y, lam = stats.boxcox(x)
    bmu, bsd = stats.norm.fit(y)
    models = {
        "normal": (stats.norm(mu, sd), dict(mean=mu, sigma=sd)),
        "lognormal": (stats.lognorm(s, scale=scale), dict(log_mean=np.log(scale), log_sigma=s)),
        "weibull": (stats.weibull_min(c, scale=wscale), dict(shape=c, scale=wscale)),
    }
    for key, (dist, params) in models.items():
        q = dist.ppf(P)
        print(key, {k: float(v) for k, v in params.items()},
              "quantiles", [float(v) for v in q], "A2", float(ad(x, dist.cdf, dist.sf)))
    bdist = stats.norm(bmu, bsd)
    q = bdist.ppf(P)
    back = [float(v) for v in ((lam * q + 1) ** (1 / lam) if lam != 0 else np.exp(q))]
    print("box-cox", dict(lambda_=float(lam), transformed_mean=float(bmu), transformed_sigma=float(bsd)),
          "quantiles", back, "A2", float(ad(y, bdist.cdf, bdist.sf)))
    if name == "skewed_right":
        lsl, usl = 0.2, 2.2
    else:
        lsl, usl = 1.0, 30.0
    for key, (dist, _) in models.items():
        print(f"  {key} ppm below {lsl}: {float(dist.cdf(lsl) * 1e6)!r}, above {usl}: {float(dist.sf(usl) * 1e6)!r}")
    tl, tu = stats.boxcox(np.array([lsl, usl]), lmbda=lam)
    print(f"  box-cox ppm below {lsl}: {float(bdist.cdf(tl) * 1e6)!r}, above {usl}: {float(bdist.sf(tu) * 1e6)!r}")
