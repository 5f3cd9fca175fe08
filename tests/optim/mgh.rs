//! Test functions of J. J. Moré, B. S. Garbow and K. E. Hillstrom (1981), "Testing
//! unconstrained optimization software", ACM TOMS 7(1), 17–41, written as sums of
//! squares `f(x) = Σ r_i(x)²` with their Jacobians, from the paper's standard starting
//! points. The number after each name is the paper's problem number.
//!
//! The minimum values `f*` are those the paper states (0 for most problems); where a
//! value below is recalled from memory rather than read off the paper, its comment says
//! so. `tests/reference/optim_scipy_evals.py` holds the same functions in Python.

// Index loops mirror the paper's formulas for residuals and Jacobians.
#![allow(clippy::needless_range_loop)]

use outcore::optim::Objective;

/// Residuals and Jacobian rows: `r[i]`, `jac[i][j] = ∂r_i/∂x_j`.
pub type Residuals = fn(&[f64], &mut [f64], &mut [Vec<f64>]);

/// One test problem.
pub struct Problem {
    /// Short name (also used by the Python script).
    pub name: &'static str,
    /// Number of residuals.
    pub m: usize,
    /// Standard starting point.
    pub x0: Vec<f64>,
    /// Accepted minimum values (the global one first; local minima some methods reach
    /// from the standard start after it).
    pub f_star: Vec<f64>,
    /// The residual function.
    pub residuals: Residuals,
}

/// A problem as an [`Objective`], counting evaluations.
pub struct SumOfSquares {
    residuals: Residuals,
    n: usize,
    r: Vec<f64>,
    jac: Vec<Vec<f64>>,
    /// Evaluations made.
    pub calls: u64,
}

impl SumOfSquares {
    /// The objective of `p`.
    pub fn new(p: &Problem) -> SumOfSquares {
        let n = p.x0.len();
        SumOfSquares {
            residuals: p.residuals,
            n,
            r: vec![0.0; p.m],
            jac: vec![vec![0.0; n]; p.m],
            calls: 0,
        }
    }
}

impl Objective for SumOfSquares {
    fn dim(&self) -> usize {
        self.n
    }

    fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> outcore::Result<f64> {
        self.calls += 1;
        for row in self.jac.iter_mut() {
            row.fill(0.0);
        }
        (self.residuals)(x, &mut self.r, &mut self.jac);
        grad.fill(0.0);
        let mut f = 0.0;
        for (ri, row) in self.r.iter().zip(&self.jac) {
            f += ri * ri;
            for (g, a) in grad.iter_mut().zip(row) {
                *g += 2.0 * ri * a;
            }
        }
        Ok(f)
    }
}

fn rosenbrock(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    r[0] = 10.0 * (x[1] - x[0] * x[0]);
    j[0][0] = -20.0 * x[0];
    j[0][1] = 10.0;
    r[1] = 1.0 - x[0];
    j[1][0] = -1.0;
}

fn freudenstein_roth(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let t = x[1];
    r[0] = -13.0 + x[0] + ((5.0 - t) * t - 2.0) * t;
    j[0][0] = 1.0;
    j[0][1] = 10.0 * t - 3.0 * t * t - 2.0;
    r[1] = -29.0 + x[0] + ((t + 1.0) * t - 14.0) * t;
    j[1][0] = 1.0;
    j[1][1] = 3.0 * t * t + 2.0 * t - 14.0;
}

fn powell_badly_scaled(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    r[0] = 1e4 * x[0] * x[1] - 1.0;
    j[0][0] = 1e4 * x[1];
    j[0][1] = 1e4 * x[0];
    let (e0, e1) = ((-x[0]).exp(), (-x[1]).exp());
    r[1] = e0 + e1 - 1.0001;
    j[1][0] = -e0;
    j[1][1] = -e1;
}

fn brown_badly_scaled(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    r[0] = x[0] - 1e6;
    j[0][0] = 1.0;
    r[1] = x[1] - 2e-6;
    j[1][1] = 1.0;
    r[2] = x[0] * x[1] - 2.0;
    j[2][0] = x[1];
    j[2][1] = x[0];
}

fn beale(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let y = [1.5, 2.25, 2.625];
    for i in 0..3 {
        let p = (i + 1) as i32;
        r[i] = y[i] - x[0] * (1.0 - x[1].powi(p));
        j[i][0] = -(1.0 - x[1].powi(p));
        j[i][1] = x[0] * f64::from(p) * x[1].powi(p - 1);
    }
}

fn helical_valley(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    use std::f64::consts::PI;
    let theta = if x[0] > 0.0 {
        (x[1] / x[0]).atan() / (2.0 * PI)
    } else if x[0] < 0.0 {
        (x[1] / x[0]).atan() / (2.0 * PI) + 0.5
    } else {
        0.25 * x[1].signum()
    };
    let rho2 = x[0] * x[0] + x[1] * x[1];
    let rho = rho2.sqrt();
    r[0] = 10.0 * (x[2] - 10.0 * theta);
    j[0][0] = 100.0 * x[1] / (2.0 * PI * rho2);
    j[0][1] = -100.0 * x[0] / (2.0 * PI * rho2);
    j[0][2] = 10.0;
    r[1] = 10.0 * (rho - 1.0);
    j[1][0] = 10.0 * x[0] / rho;
    j[1][1] = 10.0 * x[1] / rho;
    r[2] = x[2];
    j[2][2] = 1.0;
}

fn box_3d(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    for i in 0..r.len() {
        let t = 0.1 * (i + 1) as f64;
        let (a, b) = ((-t * x[0]).exp(), (-t * x[1]).exp());
        let c = (-t).exp() - (-10.0 * t).exp();
        r[i] = a - b - x[2] * c;
        j[i][0] = -t * a;
        j[i][1] = t * b;
        j[i][2] = -c;
    }
}

fn powell_singular_block(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>], k: usize) {
    let (a, b, c, d) = (x[k], x[k + 1], x[k + 2], x[k + 3]);
    let s5 = 5f64.sqrt();
    let s10 = 10f64.sqrt();
    r[k] = a + 10.0 * b;
    j[k][k] = 1.0;
    j[k][k + 1] = 10.0;
    r[k + 1] = s5 * (c - d);
    j[k + 1][k + 2] = s5;
    j[k + 1][k + 3] = -s5;
    let u = b - 2.0 * c;
    r[k + 2] = u * u;
    j[k + 2][k + 1] = 2.0 * u;
    j[k + 2][k + 2] = -4.0 * u;
    let v = a - d;
    r[k + 3] = s10 * v * v;
    j[k + 3][k] = 2.0 * s10 * v;
    j[k + 3][k + 3] = -2.0 * s10 * v;
}

fn powell_singular(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    for k in (0..x.len()).step_by(4) {
        powell_singular_block(x, r, j, k);
    }
}

fn wood(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let s90 = 90f64.sqrt();
    let s10 = 10f64.sqrt();
    r[0] = 10.0 * (x[1] - x[0] * x[0]);
    j[0][0] = -20.0 * x[0];
    j[0][1] = 10.0;
    r[1] = 1.0 - x[0];
    j[1][0] = -1.0;
    r[2] = s90 * (x[3] - x[2] * x[2]);
    j[2][2] = -2.0 * s90 * x[2];
    j[2][3] = s90;
    r[3] = 1.0 - x[2];
    j[3][2] = -1.0;
    r[4] = s10 * (x[1] + x[3] - 2.0);
    j[4][1] = s10;
    j[4][3] = s10;
    r[5] = (x[1] - x[3]) / s10;
    j[5][1] = 1.0 / s10;
    j[5][3] = -1.0 / s10;
}

fn watson(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let n = x.len();
    for i in 0..29 {
        let t = (i + 1) as f64 / 29.0;
        let mut s1 = 0.0;
        for k in 1..n {
            s1 += k as f64 * x[k] * t.powi(k as i32 - 1);
        }
        let mut s2 = 0.0;
        for (k, xk) in x.iter().enumerate() {
            s2 += xk * t.powi(k as i32);
        }
        r[i] = s1 - s2 * s2 - 1.0;
        for k in 0..n {
            let d1 = if k >= 1 {
                k as f64 * t.powi(k as i32 - 1)
            } else {
                0.0
            };
            j[i][k] = d1 - 2.0 * s2 * t.powi(k as i32);
        }
    }
    r[29] = x[0];
    j[29][0] = 1.0;
    r[30] = x[1] - x[0] * x[0] - 1.0;
    j[30][0] = -2.0 * x[0];
    j[30][1] = 1.0;
}

fn extended_rosenbrock(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    for k in (0..x.len()).step_by(2) {
        r[k] = 10.0 * (x[k + 1] - x[k] * x[k]);
        j[k][k] = -20.0 * x[k];
        j[k][k + 1] = 10.0;
        r[k + 1] = 1.0 - x[k];
        j[k + 1][k] = -1.0;
    }
}

fn variably_dimensioned(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let n = x.len();
    let mut s = 0.0;
    for k in 0..n {
        r[k] = x[k] - 1.0;
        j[k][k] = 1.0;
        s += (k + 1) as f64 * (x[k] - 1.0);
    }
    r[n] = s;
    r[n + 1] = s * s;
    for k in 0..n {
        j[n][k] = (k + 1) as f64;
        j[n + 1][k] = 2.0 * s * (k + 1) as f64;
    }
}

fn trigonometric(x: &[f64], r: &mut [f64], j: &mut [Vec<f64>]) {
    let n = x.len();
    let sum_cos: f64 = x.iter().map(|v| v.cos()).sum();
    for i in 0..n {
        let w = (i + 1) as f64;
        r[i] = n as f64 - sum_cos + w * (1.0 - x[i].cos()) - x[i].sin();
        for k in 0..n {
            j[i][k] = x[k].sin();
        }
        j[i][i] += w * x[i].sin() - x[i].cos();
    }
}

/// The ten problems of the evaluation table, in its order.
pub fn table_problems() -> Vec<Problem> {
    let n_ext_rosen = 100;
    let n_ext_powell = 40;
    let mut ext_rosen_x0 = Vec::new();
    for _ in 0..n_ext_rosen / 2 {
        ext_rosen_x0.extend([-1.2, 1.0]);
    }
    let mut ext_powell_x0 = Vec::new();
    for _ in 0..n_ext_powell / 4 {
        ext_powell_x0.extend([3.0, -1.0, 0.0, 1.0]);
    }
    vec![
        // (1) f* = 0 at (1, 1).
        Problem {
            name: "rosenbrock",
            m: 2,
            x0: vec![-1.2, 1.0],
            f_star: vec![0.0],
            residuals: rosenbrock,
        },
        // (21) f* = 0 at (1, ..., 1), n = 100.
        Problem {
            name: "extended_rosenbrock_100",
            m: n_ext_rosen,
            x0: ext_rosen_x0,
            f_star: vec![0.0],
            residuals: extended_rosenbrock,
        },
        // (13) f* = 0 at the origin (singular Hessian there).
        Problem {
            name: "powell_singular",
            m: 4,
            x0: vec![3.0, -1.0, 0.0, 1.0],
            f_star: vec![0.0],
            residuals: powell_singular,
        },
        // (22) f* = 0 at the origin, n = 40.
        Problem {
            name: "extended_powell_40",
            m: n_ext_powell,
            x0: ext_powell_x0,
            f_star: vec![0.0],
            residuals: powell_singular,
        },
        // (14) f* = 0 at (1, 1, 1, 1).
        Problem {
            name: "wood",
            m: 6,
            x0: vec![-3.0, -1.0, -3.0, -1.0],
            f_star: vec![0.0],
            residuals: wood,
        },
        // (5) f* = 0 at (3, 0.5).
        Problem {
            name: "beale",
            m: 3,
            x0: vec![1.0, 1.0],
            f_star: vec![0.0],
            residuals: beale,
        },
        // (7) f* = 0 at (1, 0, 0).
        Problem {
            name: "helical_valley",
            m: 3,
            x0: vec![-1.0, 0.0, 0.0],
            f_star: vec![0.0],
            residuals: helical_valley,
        },
        // (4) f* = 0 at (1e6, 2e-6).
        Problem {
            name: "brown_badly_scaled",
            m: 3,
            x0: vec![1.0, 1.0],
            f_star: vec![0.0],
            residuals: brown_badly_scaled,
        },
        // (26) n = 10. The paper states f* = 0; from the standard start quasi-Newton
        // methods end in the local minimum f = 2.79506e-5 (value recalled from memory,
        // as commonly reported for n = 10; not read off the paper).
        Problem {
            name: "trigonometric_10",
            m: 10,
            x0: vec![0.1; 10],
            f_star: vec![0.0, 2.79506e-5],
            residuals: trigonometric,
        },
        // (25) f* = 0 at (1, ..., 1), n = 10, x0_j = 1 − j/n.
        Problem {
            name: "variably_dimensioned_10",
            m: 12,
            x0: (1..=10).map(|j| 1.0 - j as f64 / 10.0).collect(),
            f_star: vec![0.0],
            residuals: variably_dimensioned,
        },
    ]
}

/// More problems, checked for the minimum but not part of the table.
pub fn extra_problems() -> Vec<Problem> {
    vec![
        // (2) f* = 0 at (5, 4); a local minimum f = 48.9842... at (11.41..., −0.8968...)
        // (the paper states both; the digits of the local value are recalled from
        // memory).
        Problem {
            name: "freudenstein_roth",
            m: 2,
            x0: vec![0.5, -2.0],
            f_star: vec![0.0, 48.98425367924],
            residuals: freudenstein_roth,
        },
        // (12) Box three-dimensional, m = 10: f* = 0 at (1, 10, 1).
        Problem {
            name: "box_3d",
            m: 10,
            x0: vec![0.0, 10.0, 20.0],
            f_star: vec![0.0],
            residuals: box_3d,
        },
        // (20) Watson, n = 6: f* = 2.28767e-3 (paper's value, quoted to 6 digits).
        Problem {
            name: "watson_6",
            m: 31,
            x0: vec![0.0; 6],
            f_star: vec![2.28767e-3],
            residuals: watson,
        },
        // (3) Powell badly scaled: f* = 0 at (1.098e-5, 9.106).
        Problem {
            name: "powell_badly_scaled",
            m: 2,
            x0: vec![0.0, 1.0],
            f_star: vec![0.0],
            residuals: powell_badly_scaled,
        },
    ]
}
