//! Unit tests of the optimizer's parts: the Moré–Thuente step arithmetic on the paper's
//! one-dimensional test functions, the two-loop recursion, the OWL-QN helpers, and small
//! end-to-end cases. Integration tests with published references are in
//! `tests/optim.rs`.

use super::lbfgs::{curvature_ok, dot, norm_inf, push_pair, two_loop, two_loop_free};
use super::line_search::{MoreThuente, Next, Params};
use super::owlqn::{constrain_direction, free_set, l1_term, orthant, project, pseudo_gradient};
use super::{minimize, Objective, Settings, Stop};

/// A one-dimensional function: value and derivative at a step.
type Phi<'a> = &'a dyn Fn(f64) -> (f64, f64);

/// Runs a Moré–Thuente search on `phi` (value and derivative), returning the final step
/// and the number of evaluations, or `None` if it got stuck.
fn search(phi: &dyn Fn(f64) -> (f64, f64), step0: f64, c1: f64, c2: f64) -> Option<(f64, usize)> {
    let (f0, d0) = phi(0.0);
    let params = Params {
        c1,
        c2,
        xtol: 1e-10,
        step_min: 0.0,
        step_max: 1e10,
    };
    let (mut mt, mut step) = MoreThuente::start(f0, d0, step0, params);
    for evals in 1..=30 {
        let (f, d) = phi(step);
        match mt.next(step, f, d) {
            Next::Converged => return Some((step, evals)),
            Next::Evaluate(s) => step = s,
            Next::Stuck(_) => return None,
        }
    }
    None
}

/// Checks the strong Wolfe conditions at `step` independently of the search.
fn strong_wolfe(phi: &dyn Fn(f64) -> (f64, f64), step: f64, c1: f64, c2: f64) -> bool {
    let (f0, d0) = phi(0.0);
    let (f, d) = phi(step);
    f <= f0 + c1 * step * d0 && d.abs() <= c2 * d0.abs()
}

/// Moré & Thuente (1994), §6, functions (5.1)–(5.3) and the three Yanai–Ozawa–Kaneko
/// functions, with the constants the paper uses for each (recalled from memory: μ = 0.001,
/// η = 0.1 for the first; μ = η = 0.1 for the second and third; μ = η = 0.001 for the
/// last three) and the paper's starting steps 1e-3, 1e-1, 1e1, 1e3. The search must end
/// at a strong Wolfe point within 20 evaluations (the paper reports at most about a dozen).
#[test]
fn more_thuente_paper_functions() {
    let f1 = |a: f64| {
        let b = 2.0;
        (-a / (a * a + b), (a * a - b) / ((a * a + b) * (a * a + b)))
    };
    let f2 = |a: f64| {
        let t = a + 0.004;
        (
            t.powi(5) - 2.0 * t.powi(4),
            5.0 * t.powi(4) - 8.0 * t.powi(3),
        )
    };
    let f3 = |a: f64| {
        let (b, l) = (0.01, 39.0);
        let pi = std::f64::consts::PI;
        let (p0, d0) = if a <= 1.0 - b {
            (1.0 - a, -1.0)
        } else if a >= 1.0 + b {
            (a - 1.0, 1.0)
        } else {
            ((a - 1.0).powi(2) / (2.0 * b) + b / 2.0, (a - 1.0) / b)
        };
        let c = 2.0 * (1.0 - b) / (l * pi);
        (
            p0 + c * (l * pi * a / 2.0).sin(),
            d0 + (1.0 - b) * (l * pi * a / 2.0).cos(),
        )
    };
    let yok = |b1: f64, b2: f64| {
        move |a: f64| {
            let g = |b: f64| (1.0 + b * b).sqrt() - b;
            let u = ((1.0 - a).powi(2) + b2 * b2).sqrt();
            let v = (a * a + b1 * b1).sqrt();
            (
                g(b1) * u + g(b2) * v,
                -g(b1) * (1.0 - a) / u + g(b2) * a / v,
            )
        }
    };
    let f4 = yok(0.001, 0.001);
    let f5 = yok(0.01, 0.001);
    let f6 = yok(0.001, 0.01);
    let cases: Vec<(Phi, f64, f64)> = vec![
        (&f1, 0.001, 0.1),
        (&f2, 0.1, 0.1),
        (&f3, 0.1, 0.1),
        (&f4, 0.001, 0.001),
        (&f5, 0.001, 0.001),
        (&f6, 0.001, 0.001),
    ];
    for (i, (phi, c1, c2)) in cases.into_iter().enumerate() {
        for step0 in [1e-3, 1e-1, 1e1, 1e3] {
            let (step, evals) = search(phi, step0, c1, c2)
                .unwrap_or_else(|| panic!("function {} from {step0}: no step", i + 1));
            assert!(
                strong_wolfe(phi, step, c1, c2),
                "function {} from {step0}",
                i + 1
            );
            assert!(evals <= 20, "function {} from {step0}: {evals}", i + 1);
        }
    }
}

/// A first trial that already meets the conditions is accepted after one evaluation.
#[test]
fn more_thuente_accepts_a_good_first_step() {
    let phi = |a: f64| ((a - 1.0).powi(2), 2.0 * (a - 1.0));
    assert_eq!(search(&phi, 1.0, 1e-4, 0.9), Some((1.0, 1)));
}

/// With one pair, the two-loop recursion satisfies the secant equation: `H y = s`.
#[test]
fn two_loop_satisfies_the_secant_equation() {
    let s = vec![vec![0.3, -1.2, 0.5]];
    let y = vec![vec![0.9, -2.0, 1.1]];
    let mut d = vec![0.0; 3];
    let mut alpha = vec![0.0; 1];
    two_loop(&s, &y, &y[0], &mut d, &mut alpha);
    for j in 0..3 {
        assert!((-d[j] - s[0][j]).abs() < 1e-14, "{d:?}");
    }
    // No pairs: steepest descent.
    two_loop(&[], &[], &[1.0, -2.0, 3.0], &mut d, &mut alpha);
    assert_eq!(d, vec![-1.0, 2.0, -3.0]);
}

/// The subspace two-loop: with every coordinate free it gives the bits of `two_loop`;
/// restricted, it is 0 outside the subspace and satisfies the secant equation of the
/// restricted pairs (`H_F y_F = s_F`).
#[test]
fn two_loop_free_restricts_to_the_subspace() {
    let s = vec![vec![0.3, -1.2, 0.5], vec![-0.7, 0.4, 0.9]];
    let y = vec![vec![0.9, -2.0, 1.1], vec![-1.5, 0.2, 2.3]];
    let g = [0.4, -0.8, 1.3];
    let (mut d1, mut d2) = (vec![0.0; 3], vec![0.0; 3]);
    let mut alpha = vec![0.0; 2];
    let mut kept = vec![false; 2];
    two_loop(&s, &y, &g, &mut d1, &mut alpha);
    two_loop_free(
        &s, &y, &g, &[true; 3], 1e-10, &mut d2, &mut alpha, &mut kept,
    );
    assert_eq!(
        d1.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
        d2.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
    );
    let free = [true, false, true];
    let newest_y = [y[1][0], 7.0, y[1][2]];
    two_loop_free(
        &s, &y, &newest_y, &free, 1e-10, &mut d2, &mut alpha, &mut kept,
    );
    assert_eq!(d2[1], 0.0);
    assert!(
        (-d2[0] - s[1][0]).abs() < 1e-14 && (-d2[2] - s[1][2]).abs() < 1e-14,
        "{d2:?}"
    );
}

/// On a quadratic with exact line searches, the newest pairs reproduce the Hessian's
/// inverse along their own directions; check the direction is a descent direction and
/// that the history ring keeps the newest `m` pairs in order.
#[test]
fn history_ring_keeps_newest_pairs() {
    let mut s = Vec::new();
    let mut y = Vec::new();
    for k in 0..5 {
        let v = vec![k as f64 + 1.0, 1.0];
        push_pair(&mut s, &mut y, &v, &v, 3);
    }
    assert_eq!(s.len(), 3);
    assert_eq!(s[0][0], 3.0);
    assert_eq!(s[2][0], 5.0);
    let mut d = vec![0.0; 2];
    let mut alpha = vec![0.0; 3];
    let g = [0.4, -0.7];
    two_loop(&s, &y, &g, &mut d, &mut alpha);
    assert!(dot(&g, &d) < 0.0);
}

#[test]
fn curvature_test() {
    assert!(curvature_ok(&[1.0, 0.0], &[1.0, 0.1], 1e-10));
    assert!(!curvature_ok(&[1.0, 0.0], &[-1.0, 0.1], 1e-10));
    assert!(!curvature_ok(&[1.0, 0.0], &[0.0, 1.0], 1e-10));
    assert!(!curvature_ok(&[f64::NAN, 0.0], &[1.0, 1.0], 1e-10));
}

#[test]
fn norms() {
    assert_eq!(norm_inf(&[]), 0.0);
    assert_eq!(norm_inf(&[1.0, -3.0, 2.0]), 3.0);
    assert!(norm_inf(&[1.0, f64::NAN]).is_nan());
}

/// The pseudo-gradient's cases (Andrew & Gao 2007, §3.1): away from zero the gradient
/// of `f + λ|x|`; at zero the one-sided derivative that points downhill, or 0 when the
/// subdifferential contains 0; unpenalized coordinates keep the plain gradient.
#[test]
fn pseudo_gradient_cases() {
    let l1 = [1.0, 1.0, 1.0, 1.0, 1.0, 0.0];
    let x = [2.0, -2.0, 0.0, 0.0, 0.0, 0.0];
    let g = [0.5, 0.5, -1.5, 1.5, 0.5, 0.5];
    let mut pg = [0.0; 6];
    pseudo_gradient(&l1, &x, &g, &mut pg);
    assert_eq!(pg, [1.5, -0.5, -0.5, 0.5, 0.0, 0.5]);

    let mut xi = [0.0; 6];
    orthant(&x, &pg, &mut xi);
    assert_eq!(xi, [1.0, -1.0, 1.0, -1.0, 0.0, -1.0]);

    // A direction component whose sign disagrees with −pg is dropped only at a
    // penalized coordinate at zero; away from zero (index 1) it is kept and the
    // projection of the trial point guards the orthant.
    let mut d = [-1.0, -1.0, 1.0, 1.0, 1.0, 1.0];
    constrain_direction(&l1, &x, &pg, &mut d);
    assert_eq!(d, [-1.0, -1.0, 1.0, 0.0, 0.0, 1.0]);

    // Only a penalized zero with 0 in its subdifferential (index 4) is held fixed.
    let mut free = [false; 6];
    free_set(&l1, &x, &pg, &mut free);
    assert_eq!(free, [true, true, true, true, false, true]);

    // Trial points leaving the orthant are set to exactly zero.
    let mut t = [-0.1, -1.0, 0.3, 0.2, 0.1, -5.0];
    project(&l1, &xi, &mut t);
    assert_eq!(t, [0.0, -1.0, 0.3, 0.0, 0.0, -5.0]);
    assert_eq!(l1_term(&l1, &t), 1.3);
}

/// `½(x − 0.3)² + 0.5|x|` has its minimum at exactly 0; `½(x − 2)² + 0.5|x|` at 1.5.
#[test]
fn owlqn_gives_exact_zeros() {
    struct Q(f64);
    impl Objective for Q {
        fn dim(&self) -> usize {
            1
        }
        fn eval(&mut self, x: &[f64], g: &mut [f64]) -> crate::Result<f64> {
            g[0] = x[0] - self.0;
            Ok(0.5 * (x[0] - self.0).powi(2))
        }
    }
    let settings = Settings {
        l1: vec![0.5],
        tol: 1e-12,
        ..Settings::default()
    };
    let r = minimize(&mut Q(0.3), &[1.0], &settings).unwrap();
    assert_eq!(r.stop, Stop::Converged);
    assert_eq!(r.x[0], 0.0);
    assert_eq!(r.f, 0.5 * 0.09);
    let r = minimize(&mut Q(2.0), &[-1.0], &settings).unwrap();
    assert_eq!(r.stop, Stop::Converged);
    assert!((r.x[0] - 1.5).abs() < 1e-12);
}

/// With a curvature threshold no pair can pass, every pair is skipped and counted, and
/// the run still converges (by steepest descent with unit-length first trials).
#[test]
fn skipped_pairs_are_counted() {
    struct Bowl;
    impl Objective for Bowl {
        fn dim(&self) -> usize {
            2
        }
        fn eval(&mut self, x: &[f64], g: &mut [f64]) -> crate::Result<f64> {
            g[0] = x[0];
            g[1] = 2.0 * x[1];
            Ok(0.5 * x[0] * x[0] + x[1] * x[1])
        }
    }
    let settings = Settings {
        curvature_eps: 1.0,
        tol: 1e-8,
        ..Settings::default()
    };
    let r = minimize(&mut Bowl, &[3.0, -1.0], &settings).unwrap();
    assert_eq!(r.stop, Stop::Converged);
    assert!(r.iterations > 1);
    assert_eq!(r.pairs_skipped, r.iterations);
}

/// A zero-dimensional problem is converged at once.
#[test]
fn zero_dimensional_problem() {
    struct Empty;
    impl Objective for Empty {
        fn dim(&self) -> usize {
            0
        }
        fn eval(&mut self, _: &[f64], _: &mut [f64]) -> crate::Result<f64> {
            Ok(4.0)
        }
    }
    let r = minimize(&mut Empty, &[], &Settings::default()).unwrap();
    assert_eq!((r.stop, r.f, r.evaluations), (Stop::Converged, 4.0, 1));
}
