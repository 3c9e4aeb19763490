//! Nile river annual flow, local level model: checks against Durbin & Koopman (2012) and statsmodels.
//!
//! Data: statsmodels.datasets.nile (open dataset, 1871-1970), committed as tests/reference/nile.csv.
//! Reference numbers: tests/reference/nile_level.json and nile_missing.json, written by
//! tests/reference/make_fixtures.py (statsmodels 0.14, UnobservedComponents with exact diffuse initialisation).

mod common;

use common::{assert_close, fixture, floats};
use gaugewise::estimate::{self, Data};
use gaugewise::filter::{self, StepKind};
use gaugewise::model::{ModelKind, ModelParams, ModelSpec};

fn level(obs_var: f64, level_var: f64) -> ModelSpec {
    ModelSpec {
        interval: 1.0,
        params: ModelParams::Level { obs_var, level_var },
    }
}

fn years(n: usize) -> Vec<f64> {
    (0..n).map(|i| i as f64).collect()
}

#[test]
fn nile_ml_estimates_match_durbin_koopman() {
    let fx = fixture("nile_level.json");
    let y = floats(&fx["data"]["y"]);
    let t = years(y.len());
    let data = Data {
        times: &t,
        values: &y,
        interval: 1.0,
    };
    let fit = estimate::fit(&data, ModelKind::Level, None).unwrap();
    assert!(fit.converged);
    let Some(ModelSpec {
        params: ModelParams::Level { obs_var, level_var },
        ..
    }) = fit.spec
    else {
        panic!("level fit expected")
    };
    // Durbin & Koopman (2012), section 2.10: sigma2_eps = 15099, sigma2_eta = 1469.1 (to 0.1%).
    assert_close(obs_var, 15099.0, 1e-3, "obs_var vs D&K");
    assert_close(level_var, 1469.1, 1e-3, "level_var vs D&K");
    // statsmodels 0.14 fit of the same model: parameters to 1e-4, log-likelihood to 1e-8 relative.
    let sm = &fx["fit"];
    assert_close(
        obs_var,
        sm["params"]["obs_var"].as_f64().unwrap(),
        1e-4,
        "obs_var vs statsmodels",
    );
    assert_close(
        level_var,
        sm["params"]["level_var"].as_f64().unwrap(),
        1e-4,
        "level_var vs statsmodels",
    );
    assert_close(
        fit.loglik,
        sm["llf"].as_f64().unwrap(),
        1e-8,
        "loglik vs statsmodels",
    );
    // REFERENCES.md: about -633.46 with the diffuse step's -0.5 ln(2 pi) included.
    assert!((fit.loglik + 633.46).abs() < 0.01);
    assert_close(
        fit.aic,
        sm["aic"].as_f64().unwrap(),
        1e-8,
        "aic vs statsmodels",
    );
    assert_close(
        fit.bic,
        sm["bic"].as_f64().unwrap(),
        1e-8,
        "bic vs statsmodels",
    );
    assert!(fit.boundary.is_empty());
}

#[test]
fn nile_diagnostics_match_statsmodels_and_durbin_koopman() {
    let fx = fixture("nile_level.json");
    let y = floats(&fx["data"]["y"]);
    let t = years(y.len());
    let sm = &fx["fit"];
    let spec = level(
        sm["params"]["obs_var"].as_f64().unwrap(),
        sm["params"]["level_var"].as_f64().unwrap(),
    );
    let mut std_innov = Vec::new();
    filter::run(&spec, &t, &y, |_, s| {
        if s.kind == StepKind::Observed {
            std_innov.push(s.standardized)
        }
    })
    .unwrap();
    assert_eq!(std_innov.len(), 99);
    let lb = gaugewise::stats::ljung_box(&std_innov, 9, 0).unwrap();
    // statsmodels test_serial_correlation('ljungbox', lags=[9]); D&K (2012) section 2.12 report Q(9) = 8.84.
    assert_close(
        lb.q,
        sm["diagnostics"]["ljungbox_stat"][0].as_f64().unwrap(),
        1e-8,
        "Q(9)",
    );
    assert!((lb.q - 8.84).abs() < 0.01);
    assert_close(
        lb.p,
        sm["diagnostics"]["ljungbox_pvalue"][0].as_f64().unwrap(),
        1e-6,
        "Q(9) p",
    );
}

#[test]
fn nile_filter_at_fixed_parameters_matches_statsmodels() {
    for (file, tol) in [("nile_level.json", 1e-9), ("nile_missing.json", 1e-9)] {
        let fx = fixture(file);
        let mut y = floats(&fx["data"]["y"]);
        if let Some(missing) = fx.get("missing_index0") {
            for i in missing.as_array().unwrap() {
                y[i.as_u64().unwrap() as usize] = f64::NAN;
            }
        }
        let t = years(y.len());
        let fixed = &fx["fixed"];
        let spec = level(
            fixed["params"]["obs_var"].as_f64().unwrap(),
            fixed["params"]["level_var"].as_f64().unwrap(),
        );
        let series = &fixed["series"];
        let (est, est_var) = (
            floats(&series["filtered_signal"]),
            floats(&series["filtered_signal_var"]),
        );
        let (llf_obs, innov) = (floats(&series["llf_obs"]), floats(&series["innovations"]));
        let lik = filter::run(&spec, &t, &y, |i, s| {
            assert_close(s.estimate, est[i], tol, &format!("{file} estimate[{i}]"));
            assert_close(
                s.estimate_var,
                est_var[i],
                tol,
                &format!("{file} estimate_var[{i}]"),
            );
            assert_close(s.loglik, llf_obs[i], tol, &format!("{file} llf_obs[{i}]"));
            if s.kind == StepKind::Observed {
                assert_close(
                    s.innovation,
                    innov[i],
                    tol,
                    &format!("{file} innovation[{i}]"),
                );
            } else if s.kind == StepKind::Missing {
                assert!(
                    innov[i].is_nan(),
                    "{file}: innovation[{i}] should be missing"
                );
            }
        })
        .unwrap();
        assert_close(
            lik.loglik,
            fixed["llf"].as_f64().unwrap(),
            1e-10,
            &format!("{file} llf"),
        );
    }
}

#[test]
fn nile_with_missing_values_fits_like_statsmodels() {
    let fx = fixture("nile_missing.json");
    let mut y = floats(&fx["data"]["y"]);
    for i in fx["missing_index0"].as_array().unwrap() {
        y[i.as_u64().unwrap() as usize] = f64::NAN;
    }
    let t = years(y.len());
    let data = Data {
        times: &t,
        values: &y,
        interval: 1.0,
    };
    let fit = estimate::fit(&data, ModelKind::Level, None).unwrap();
    let sm = &fx["fit"];
    let Some(ModelSpec {
        params: ModelParams::Level { obs_var, level_var },
        ..
    }) = fit.spec
    else {
        panic!("level fit expected")
    };
    assert_close(
        obs_var,
        sm["params"]["obs_var"].as_f64().unwrap(),
        1e-3,
        "obs_var",
    );
    assert_close(
        level_var,
        sm["params"]["level_var"].as_f64().unwrap(),
        1e-3,
        "level_var",
    );
    assert_close(fit.loglik, sm["llf"].as_f64().unwrap(), 1e-4, "loglik");
    assert_close(fit.aic, sm["aic"].as_f64().unwrap(), 1e-4, "aic");
    // BIC differs on purpose: statsmodels counts missing samples in n, gaugewise counts values present (README).
    assert_eq!(fit.n_obs, 60);
}
