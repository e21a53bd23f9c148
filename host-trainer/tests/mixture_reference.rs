//! The trainer's Gaussian mixture (`fit::mixture`) against scikit-learn's `GaussianMixture`
//! (full covariances) on Fisher's iris data (Fisher 1936, the copy scikit-learn ships as
//! `sklearn.datasets.load_iris`).
//!
//! The reference, `tests/reference/gmm/iris_gmm.json`, was computed once by
//! `tests/reference/gmm/make_reference.py` (scikit-learn 1.7.2, numpy 2.3.4, Python 3.11.7; the
//! versions and the exact call are in the JSON) and holds the 150 rows it was fitted on. For every
//! K = 1..4 it was fitted from 200 seeds (one k-means++ start each, `tol = 1e-12`,
//! `max_iter = 20000`, `reg_covar = 1e-6`) and records the best optimum and every optimum reached.
//!
//! What the reference shows, and what is compared:
//! * K = 1 and K = 2: one optimum, reached by all 200 starts. K = 3: the best optimum is reached by
//!   175 of the 200 starts, four worse ones by the rest. For these three, the trainer's best of
//!   many starts must be the same optimum: weights, means, covariances (up to the order of the
//!   modes), total log-likelihood and BIC.
//! * K = 4: the best of the 200 starts (log L = −65.0, reached once) is a degenerate optimum: one
//!   mode of about 29 setosa rows has a covariance whose smallest eigenvalue is `reg_covar` itself
//!   (those rows share one value of a coordinate, recorded to 0.1 cm), and only `reg_covar` keeps
//!   the likelihood finite. Non-degenerate optima lie near −150 to −160, scattered over many
//!   starts. Both libraries may land on any of them, so for K = 4 only what must hold is
//!   compared: the trainer's log-likelihood is not above the best scikit-learn found (beyond
//!   rounding) and its BIC obeys the same formula.
//! * The K chosen by BIC: among K = 1..3 (where both reach the same optimum) both choose K = 2;
//!   scikit-learn's K = 4 choice rests on the degenerate optimum, so it is not compared.

use ellipsoid_trainer::fit::mixture::{choose_modes, fit_mixture, Mixture, MixtureOptions};
use serde_json::Value;

const REFERENCE: &str = include_str!("../../tests/reference/gmm/iris_gmm.json");

fn reference() -> Value {
    serde_json::from_str(REFERENCE).expect("the reference JSON parses")
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

fn rows(r: &Value) -> Vec<Vec<f64>> {
    let rows: Vec<Vec<f64>> = r["data"].as_array().unwrap().iter().map(floats).collect();
    assert_eq!(rows.len(), 150);
    assert!(rows.iter().all(|x| x.len() == 4));
    rows
}

/// The same settings as the reference: scikit-learn's `tol` is on the change of the mean
/// log-likelihood per row, as ours is.
fn options(r: &Value, n_init: usize) -> MixtureOptions {
    MixtureOptions {
        max_iter: 20_000,
        tol: 1e-12,
        n_init,
        reg_covar: r["reg_covar"].as_f64().unwrap(),
        seed: 0,
    }
}

struct Reference {
    weights: Vec<f64>,
    means: Vec<Vec<f64>>,
    covariances: Vec<Vec<f64>>,
    log_likelihood: f64,
    bic: f64,
    n_parameters: usize,
}

fn reference_fit(r: &Value, k: usize) -> Reference {
    let f = &r["fits"][k - 1];
    assert_eq!(f["k"].as_u64(), Some(k as u64));
    Reference {
        weights: floats(&f["weights"]),
        means: f["means"].as_array().unwrap().iter().map(floats).collect(),
        covariances: f["covariances"]
            .as_array()
            .unwrap()
            .iter()
            .map(floats)
            .collect(),
        log_likelihood: f["log_likelihood"].as_f64().unwrap(),
        bic: f["bic"].as_f64().unwrap(),
        n_parameters: f["n_parameters"].as_u64().unwrap() as usize,
    }
}

fn permutations(k: usize) -> Vec<Vec<usize>> {
    if k == 0 {
        return vec![vec![]];
    }
    let mut out = Vec::new();
    for p in permutations(k - 1) {
        for i in 0..=p.len() {
            let mut q = p.clone();
            q.insert(i, k - 1);
            out.push(q);
        }
    }
    out
}

/// The order of our modes that matches the reference's best: `perm[j]` is our mode for the
/// reference's mode `j`, chosen by the smallest sum of squared mean differences.
fn matching(ours: &Mixture, reference: &Reference) -> Vec<usize> {
    let k = reference.weights.len();
    permutations(k)
        .into_iter()
        .min_by(|a, b| {
            let cost = |p: &Vec<usize>| -> f64 {
                (0..k)
                    .map(|j| {
                        ours.means[p[j]]
                            .iter()
                            .zip(&reference.means[j])
                            .map(|(x, y)| (x - y).powi(2))
                            .sum::<f64>()
                    })
                    .sum()
            };
            cost(a).total_cmp(&cost(b))
        })
        .unwrap()
}

fn max_abs_diff(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

fn as_mixture(re: &Reference) -> Mixture {
    Mixture {
        weights: re.weights.clone(),
        means: re.means.clone(),
        covariances: re.covariances.clone(),
        log_likelihood: re.log_likelihood,
        iterations: 0,
        converged: true,
    }
}

/// Our density and BIC evaluated on scikit-learn's own parameters give scikit-learn's figures,
/// for every K (the degenerate K = 4 optimum too). This checks the log-density, the parameter
/// count and the BIC formula apart from where EM lands. The JSON holds the parameters as Python's
/// shortest round-trip decimals, so they are bit-exact; the bound allows for different summation
/// orders over 150 rows (1e-9 relative, about 1e-7 absolute on log L ≈ −380).
#[test]
fn density_and_bic_on_scikit_learn_parameters() {
    let r = reference();
    let x = rows(&r);
    for k in 1..=4 {
        let re = reference_fit(&r, k);
        let m = as_mixture(&re);
        let ll = m.score_rows(&x).unwrap();
        assert!(
            (ll - re.log_likelihood).abs() <= 1e-9 * re.log_likelihood.abs(),
            "K = {k}: log L of scikit-learn's parameters {ll} here, {} there",
            re.log_likelihood
        );
        assert_eq!(m.n_parameters(), re.n_parameters, "K = {k}");
        assert!(
            (m.bic(x.len()) - re.bic).abs() <= 1e-9 * re.bic.abs(),
            "K = {k}: BIC {} here, {} there",
            m.bic(x.len()),
            re.bic
        );
    }
}

/// Where EM has one optimum (K = 1, 2) or a best one that most starts reach (K = 3: 175 of 200
/// scikit-learn starts), our best of 20 starts is scikit-learn's best of 200.
///
/// Tolerances. K = 1 and 2 converge in a few iterations to rounding (measured: 4e-12 in the
/// worst covariance entry), so they are held to 1e-9: that also catches a missing `reg_covar`
/// (1e-6 on the diagonal) or an n − 1 divisor (0.7 % of each covariance). K = 3 converges
/// linearly and slowly; both libraries stop when the mean log-likelihood per row changes by less
/// than 1e-12, and near an optimum the log-likelihood is flat (quadratic in the parameters), so
/// each stops about √(1e-12 · n / curvature) ≈ 1e-6 short of the fixed point in the parameters
/// (measured: 3.4e-6 on a mean, 1.6e-6 on a weight, 2.3e-8 on the total log L). Held to 2e-5 on
/// weights, means (cm) and covariances (cm²) and 1e-6 on log L and 2e-6 on BIC: the data are
/// recorded to 0.1 cm, and the next optimum is 6.4 log-likelihood units away.
#[test]
fn same_optimum_as_scikit_learn_for_one_to_three_modes() {
    let r = reference();
    let x = rows(&r);
    for k in 1..=3 {
        let ours = fit_mixture(&x, k, &options(&r, 20)).unwrap();
        assert!(ours.converged, "K = {k} did not converge");
        let re = reference_fit(&r, k);
        let (tol, tol_ll) = if k <= 2 { (1e-9, 1e-9) } else { (2e-5, 1e-6) };
        let p = matching(&ours, &re);
        for (j, &o) in p.iter().enumerate() {
            let dw = (ours.weights[o] - re.weights[j]).abs();
            let dm = max_abs_diff(&ours.means[o], &re.means[j]);
            let dc = max_abs_diff(&ours.covariances[o], &re.covariances[j]);
            assert!(
                dw <= tol && dm <= tol && dc <= tol,
                "K = {k}, mode {j}: weight off by {dw:e}, mean by {dm:e}, covariance by {dc:e} \
                 (bound {tol:e})"
            );
        }
        let dll = (ours.log_likelihood - re.log_likelihood).abs();
        assert!(
            dll <= tol_ll,
            "K = {k}: log L {} here, {} there",
            ours.log_likelihood,
            re.log_likelihood
        );
        let dbic = (ours.bic(x.len()) - re.bic).abs();
        assert!(
            dbic <= 2.0 * tol_ll,
            "K = {k}: BIC {} here, {} there",
            ours.bic(x.len()),
            re.bic
        );
    }
}

/// K = 4 has many optima (42 distinct among scikit-learn's 200 starts, the best a degenerate one
/// reached once): the parameters are not compared. What must hold whatever optimum EM reaches:
/// it converged, and its log-likelihood is not above the best scikit-learn found, beyond
/// rounding. (Our best of 20 starts lands at −163.06, an optimum scikit-learn reached 5 times.)
#[test]
fn four_modes_not_above_the_best_optimum() {
    let r = reference();
    let x = rows(&r);
    let ours = fit_mixture(&x, 4, &options(&r, 20)).unwrap();
    let re = reference_fit(&r, 4);
    assert!(ours.converged);
    assert!(
        ours.log_likelihood <= re.log_likelihood + 1e-6,
        "log L {} above scikit-learn's best {}",
        ours.log_likelihood,
        re.log_likelihood
    );
    // The same value as scored afresh from the parameters (the fit reports what it fitted).
    let again = ours.score_rows(&x).unwrap();
    assert!(
        (again - ours.log_likelihood).abs() <= 1e-6,
        "{again} vs {}",
        ours.log_likelihood
    );
}

/// The K that BIC chooses among K = 1..3, where both reach the same optimum: K = 2 (setosa, and
/// versicolor with virginica), as scikit-learn's BIC values in the JSON say (574.02 against
/// 829.98 and 580.84). scikit-learn's best over K = 1..4 is K = 4, but only through the degenerate
/// optimum, so K = 4 is left out of this comparison.
#[test]
fn bic_chooses_the_same_number_of_modes() {
    let r = reference();
    let x = rows(&r);
    let reference_bic: Vec<f64> = (1..=3).map(|k| reference_fit(&r, k).bic).collect();
    let expected = 1
        + (0..3)
            .min_by(|&a, &b| reference_bic[a].total_cmp(&reference_bic[b]))
            .unwrap();
    assert_eq!(expected, 2, "the reference itself");
    let (m, tried) = choose_modes(&x, 3, &options(&r, 20)).unwrap();
    assert_eq!(m.weights.len(), expected, "BIC per K here: {tried:?}");
    assert_eq!(tried.len(), 3);
    for (k, bic) in tried {
        let want = reference_bic[k - 1];
        assert!(
            (bic - want).abs() <= 2e-6,
            "K = {k}: BIC {bic} here, {want} there"
        );
    }
}
