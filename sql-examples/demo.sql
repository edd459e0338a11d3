-- The demo: pipe breaks in an invented water network (demo-parquet/pipe_breaks.parquet).
-- Each row is a cell of district x material x install decade x diameter x soil, with the
-- kilometres of main observed for five years (km_years) and the breaks recorded.
CREATE VIEW mains AS SELECT *, (2010 - install_decade) / 10.0 AS decades_old FROM pipe_breaks;

-- Break rates per district, highest first (decades_old = decades since 2010, for the models).
SELECT district, COUNT(*) AS cells, SUM(breaks) AS breaks, SUM(km_years) AS km_years,
       100 * SUM(breaks) / SUM(km_years) AS breaks_per_100_km_year
FROM mains GROUP BY district ORDER BY breaks_per_100_km_year DESC;

-- One Poisson rate model per district: log(rate) = material + age + diameter + soil, offset
-- log(km_years). The fit is an ordinary column: filter, sort and join it like any other.
-- Look at the status: Kiln Row has no breaks on steel (a boundary estimate), and Quarry Hill's
-- dispersion is far above 1 with a tiny overdispersion p-value: its intervals need quasi or
-- sandwich standard errors.
SELECT district, fit.status, fit.n_used, round(fit.dispersion, 2) AS dispersion, fit.overdispersion_p
FROM (SELECT district,
             poisson_fit(breaks, km_years, material, decades_old, diameter_class, soil_corrosivity, 'ref.material=cast_iron, ref.diameter_class=small, ref.soil_corrosivity=low') AS fit
      FROM mains GROUP BY district)
ORDER BY dispersion DESC;

-- Rate ratios with 95% intervals for the whole network (district as a factor), quasi-Poisson
-- standard errors because of the overdispersed district, sorted by size. Compare with the true
-- values in demo-parquet/true_parameters.json.
WITH f AS (
  SELECT poisson_fit(breaks, km_years, district, material, decades_old, diameter_class, soil_corrosivity,
                     'se=quasi, ref.district=Harbour Flats, ref.material=cast_iron, ref.diameter_class=small, ref.soil_corrosivity=low') AS fit
  FROM mains WHERE district <> 'Kiln Row'
), t AS (SELECT unnest(fit.terms) AS t FROM f)
SELECT t.term, t.rate_ratio, t.rr_low, t.rr_high, t.p_value FROM t WHERE t.term <> 'intercept' ORDER BY t.rate_ratio DESC;

-- How much more often do steel mains break than cast-iron ones, district by district? Each
-- district's own model gives one rate ratio; the forest plot shows them against 1 (Kiln Row has
-- no breaks on steel: a boundary term, drawn without a mark).
WITH f AS (
  SELECT district, poisson_fit(breaks, km_years, material, decades_old, diameter_class, soil_corrosivity,
                               'ref.material=cast_iron, ref.diameter_class=small, ref.soil_corrosivity=low') AS fit
  FROM mains GROUP BY district
)
SELECT district, t['rate_ratio'] AS rate_ratio, t['rr_low'] AS rr_low, t['rr_high'] AS rr_high, t['flag'] AS flag, level
FROM (SELECT district, fit_term(fit, 'material=steel') AS t, fit.level AS level FROM f) ORDER BY district;
--> draw forest

-- Observed / expected breaks per district, scoring every cell with a network-wide model that
-- ignores districts: a ratio above 1 means more breaks than the network's pattern predicts.
WITH f AS (
  SELECT poisson_fit(breaks, km_years, material, install_decade, diameter_class, soil_corrosivity) AS fit FROM pipe_breaks
)
SELECT district, SUM(breaks) AS observed,
       round(SUM(fit_expected(fit, km_years, material, install_decade, diameter_class, soil_corrosivity)), 1) AS expected,
       round(SUM(breaks) / SUM(fit_expected(fit, km_years, material, install_decade, diameter_class, soil_corrosivity)), 3) AS ratio
FROM pipe_breaks CROSS JOIN f GROUP BY district ORDER BY ratio DESC;

-- The same comparison with exact 95% limits and the exact p-value of "as expected"
-- (standardized_ratio takes the expected counts from the network-wide model).
WITH f AS (
  SELECT poisson_fit(breaks, km_years, material, install_decade, diameter_class, soil_corrosivity) AS fit FROM pipe_breaks
), oe AS (
  SELECT district, standardized_ratio(breaks, fit_expected(fit, km_years, material, install_decade, diameter_class, soil_corrosivity)) AS r
  FROM pipe_breaks CROSS JOIN f GROUP BY district
)
SELECT district, r.observed AS observed, round(r.expected, 1) AS expected, round(r.ratio, 3) AS ratio,
       round(r.low, 3) AS low, round(r.high, 3) AS high, r.p_value AS p_value
FROM oe ORDER BY ratio DESC;
--> draw funnel

-- Break rates per 100 km-years standardised directly to the whole network's km-years by material
-- and install decade: districts whose pipe is older or of weaker material are compared as if
-- they had the network's mix (Fay-Feuer gamma interval). crude_rate is the unadjusted rate.
WITH strata AS (
  SELECT district, material, install_decade, SUM(breaks) AS breaks, SUM(km_years) AS km_years
  FROM pipe_breaks GROUP BY district, material, install_decade
), standard AS (
  SELECT material, install_decade, SUM(km_years) AS weight FROM pipe_breaks GROUP BY material, install_decade
), d AS (
  SELECT district, standardized_rate(s.breaks, s.km_years, standard.weight, 'per=100') AS r
  FROM strata s JOIN standard USING (material, install_decade) GROUP BY district
)
SELECT district, round(r.rate, 2) AS standardized_rate, round(r.low, 2) AS low, round(r.high, 2) AS high,
       round(r.crude_rate, 2) AS crude_rate, r.n_strata AS n_strata
FROM d ORDER BY standardized_rate DESC;

-- Crew call-outs by cause and season (demo-parquet/callouts.csv): is the cause independent of
-- the season? The independence log-linear model's deviance is the G-squared statistic.
SELECT fit.deviance AS g_squared, fit.df_resid AS df, fit.deviance_p AS p_value
FROM (SELECT poisson_count_fit(callouts, cause, season) AS fit FROM callouts);

-- Which cells depart from independence? Pearson residuals (observed - expected) / sqrt(expected).
WITH f AS (SELECT poisson_count_fit(callouts, cause, season) AS fit FROM callouts),
e AS (SELECT cause, season, callouts, fit_expected(fit, 1, cause, season) AS expected FROM callouts CROSS JOIN f),
r AS (SELECT cause, season, callouts, expected, (callouts - expected) / sqrt(expected) AS residual FROM e)
SELECT cause, season, callouts, round(expected, 1) AS expected, round(residual, 2) AS residual
FROM r ORDER BY abs(residual) DESC LIMIT 5;
