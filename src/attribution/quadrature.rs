//! Quadrature rules on [0, 1] for the path integral of integrated gradients.
//!
//! Integrated gradients integrate `∂f/∂xᵢ` along `x' + α (x - x')` for α from 0 to 1.
//! Three rules of `M` points:
//!
//! ```text
//! midpoint      αⱼ = (j - ½)/M,      wⱼ = 1/M                    error O(M⁻²) (smooth f)
//! trapezoid     αⱼ = (j - 1)/(M - 1), wⱼ = 1/(M - 1), halved at the ends    O(M⁻²)
//! gauss-legendre αⱼ the roots of P_M mapped to [0, 1], wⱼ their weights / 2  O(ρ^-2M)
//! ```
//!
//! The left Riemann sum that some implementations use has error O(M⁻¹); the rules above
//! are the standard composite and Gaussian rules (Abramowitz & Stegun 1964, §25.4).
//! Gauss-Legendre nodes are found by Newton's method on the three-term recurrence of the
//! Legendre polynomials, started at Tricomi's approximation `cos(π (j - ¼)/(M + ½))`.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// A quadrature rule for the path integral.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum QuadratureRule {
    /// Composite midpoint rule (Riemann sums at the centres of M equal cells).
    Midpoint,
    /// Composite trapezoid rule over M equally spaced points, ends included.
    Trapezoid,
    /// Gauss-Legendre rule with M nodes.
    GaussLegendre,
}

impl FromStr for QuadratureRule {
    type Err = Error;
    fn from_str(text: &str) -> Result<Self> {
        match text {
            "midpoint" => Ok(QuadratureRule::Midpoint),
            "trapezoid" => Ok(QuadratureRule::Trapezoid),
            "gauss-legendre" => Ok(QuadratureRule::GaussLegendre),
            _ => Err(Error::InvalidSetting {
                flag: "--rule",
                value: text.to_string(),
                expected: "one of midpoint, trapezoid, gauss-legendre".into(),
            }),
        }
    }
}

impl fmt::Display for QuadratureRule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            QuadratureRule::Midpoint => "midpoint",
            QuadratureRule::Trapezoid => "trapezoid",
            QuadratureRule::GaussLegendre => "gauss-legendre",
        })
    }
}

impl QuadratureRule {
    /// Nodes in [0, 1] and weights summing to 1, for `points` evaluation points.
    pub fn nodes(self, points: usize) -> Result<(Vec<f64>, Vec<f64>)> {
        let least = if self == QuadratureRule::Trapezoid {
            2
        } else {
            1
        };
        if points < least {
            return Err(Error::InvalidSetting {
                flag: "--steps",
                value: points.to_string(),
                expected: format!("at least {least} path points for the {self} rule"),
            });
        }
        let m = points as f64;
        Ok(match self {
            QuadratureRule::Midpoint => (
                (0..points).map(|j| (j as f64 + 0.5) / m).collect(),
                vec![1.0 / m; points],
            ),
            QuadratureRule::Trapezoid => {
                let h = 1.0 / (m - 1.0);
                let mut w = vec![h; points];
                w[0] *= 0.5;
                w[points - 1] *= 0.5;
                ((0..points).map(|j| j as f64 * h).collect(), w)
            }
            QuadratureRule::GaussLegendre => gauss_legendre(points),
        })
    }
}

/// Gauss-Legendre nodes and weights on [0, 1].
fn gauss_legendre(n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut nodes = vec![0.0; n];
    let mut weights = vec![0.0; n];
    let nf = n as f64;
    for i in 0..n.div_ceil(2) {
        let mut x = (std::f64::consts::PI * (i as f64 + 0.75) / (nf + 0.5)).cos();
        let mut derivative = 1.0;
        for _ in 0..100 {
            // P_n(x) and P_n'(x) by the recurrence (k+1) P_{k+1} = (2k+1) x P_k - k P_{k-1}.
            let (mut p0, mut p1) = (1.0, x);
            for k in 1..n {
                let k = k as f64;
                let p2 = ((2.0 * k + 1.0) * x * p1 - k * p0) / (k + 1.0);
                p0 = p1;
                p1 = p2;
            }
            let pn = if n == 0 { 1.0 } else { p1 };
            let pn_1 = if n == 1 { 1.0 } else { p0 };
            derivative = nf * (x * pn - pn_1) / (x * x - 1.0);
            let step = pn / derivative;
            x -= step;
            if step.abs() < 1e-16 {
                break;
            }
        }
        let w = 2.0 / ((1.0 - x * x) * derivative * derivative);
        // Map [-1, 1] to [0, 1]: α = (1 - x)/2 keeps the nodes ascending.
        nodes[i] = (1.0 - x) / 2.0;
        nodes[n - 1 - i] = (1.0 + x) / 2.0;
        weights[i] = w / 2.0;
        weights[n - 1 - i] = w / 2.0;
    }
    (nodes, weights)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Abramowitz & Stegun (1964), Table 25.4, n = 5 on [-1, 1]: abscissae 0,
    /// ±0.538469310105683, ±0.906179845938664; weights 0.568888888888889,
    /// 0.478628670499366, 0.236926885056189.
    #[test]
    fn five_point_gauss_legendre_matches_the_handbook_table() {
        let (x, w) = QuadratureRule::GaussLegendre.nodes(5).unwrap();
        let table = [
            (-0.906179845938664, 0.236926885056189),
            (-0.538469310105683, 0.478628670499366),
            (0.0, 0.568888888888889),
            (0.538469310105683, 0.478628670499366),
            (0.906179845938664, 0.236926885056189),
        ];
        for (j, (node, weight)) in table.iter().enumerate() {
            assert!(
                (2.0 * x[j] - 1.0 - node).abs() < 1e-14,
                "node {j}: {}",
                x[j]
            );
            assert!((2.0 * w[j] - weight).abs() < 1e-14, "weight {j}: {}", w[j]);
        }
    }

    #[test]
    fn weights_sum_to_one_and_bad_counts_are_refused() {
        for rule in [
            QuadratureRule::Midpoint,
            QuadratureRule::Trapezoid,
            QuadratureRule::GaussLegendre,
        ] {
            for m in [2, 3, 16, 64] {
                let (x, w) = rule.nodes(m).unwrap();
                assert_eq!(x.len(), m);
                assert!((w.iter().sum::<f64>() - 1.0).abs() < 1e-13, "{rule} {m}");
                assert!(x.iter().all(|a| (0.0..=1.0).contains(a)));
            }
        }
        assert!(QuadratureRule::Trapezoid.nodes(1).is_err());
        assert!(QuadratureRule::Midpoint.nodes(0).is_err());
    }
}
