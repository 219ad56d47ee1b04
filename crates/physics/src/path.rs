//! Minimum-energy paths between two minima: the nudged elastic band with a climbing
//! image (Henkelman, Uberuaga & Jónsson, J. Chem. Phys. 113, 9901, 2000), with the
//! improved tangent of Henkelman & Jónsson (J. Chem. Phys. 113, 9978, 2000).
//!
//! The band's end points stay fixed. Each interior image feels the true force
//! perpendicular to the path and a spring force along it; the highest image, once the
//! band has roughly settled, climbs up along the path instead, so that it converges to
//! the saddle point and its energy estimates the barrier.

use serde::{Deserialize, Serialize};

use crate::energy::EnergyModel;
use crate::error::{require, PhysicsError};

/// Band settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct NebParams {
    /// Spring constant between neighbouring images (energy per length²).
    pub spring: f64,
    /// Largest displacement of one image in one step.
    pub max_step: f64,
    /// Step size: displacement = step · force, then capped at `max_step`.
    pub step: f64,
    /// Converged when the largest force component on any image is below this.
    pub force_tolerance: f64,
    /// Give up after this many steps.
    pub max_steps: u64,
    /// Steps of plain NEB before the highest image starts to climb.
    pub climb_after: u64,
}

impl Default for NebParams {
    fn default() -> Self {
        NebParams {
            spring: 50.0,
            max_step: 0.01,
            step: 3e-4,
            force_tolerance: 1e-2,
            max_steps: 100_000,
            climb_after: 200,
        }
    }
}

/// The relaxed band.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NebResult {
    /// Images `[n, dim]`, end points included.
    pub images: Vec<f64>,
    /// Energy of every image.
    pub energies: Vec<f64>,
    /// Index of the climbing (highest) image.
    pub climbing: usize,
    /// Steps taken.
    pub steps: u64,
    /// Whether the force tolerance was reached.
    pub converged: bool,
    /// Energy evaluations spent.
    pub n_evals: u64,
}

/// Relaxes a band of `images` (`[n, dim]`, n ≥ 3, end points fixed) towards the
/// minimum-energy path.
pub fn neb(
    model: &dyn EnergyModel,
    images: &[f64],
    params: &NebParams,
) -> Result<NebResult, PhysicsError> {
    let dim = model.dim();
    require(
        dim > 0 && images.len().is_multiple_of(dim),
        "images",
        "must be whole configurations",
    )?;
    let n = images.len() / dim;
    require(n >= 3, "images", "a band needs at least 3 images")?;
    require(
        params.spring > 0.0 && params.step > 0.0 && params.max_step > 0.0,
        "spring",
        "spring, step and max_step must be positive",
    )?;
    let mut x = images.to_vec();
    let mut e = vec![0.0; n];
    let mut f = vec![0.0; n * dim];
    let mut n_evals = 0u64;
    let mut climbing = 0;
    for step in 0..params.max_steps {
        model.evaluate(&x, &mut e, Some(&mut f))?;
        n_evals += n as u64;
        if e.iter().any(|v| !v.is_finite()) {
            return Err(PhysicsError::NonFinite {
                what: "nudged elastic band",
                step,
            });
        }
        climbing = (1..n - 1)
            .max_by(|&a, &b| e[a].total_cmp(&e[b]))
            .unwrap_or(1);
        let climb = step >= params.climb_after;
        let mut worst = 0.0f64;
        let mut moves = vec![0.0; n * dim];
        for i in 1..n - 1 {
            let tau = tangent(&x, &e, i, dim);
            let fi = &f[i * dim..(i + 1) * dim];
            let f_par: f64 = fi.iter().zip(&tau).map(|(a, b)| a * b).sum();
            let total: Vec<f64> = if climb && i == climbing {
                fi.iter()
                    .zip(&tau)
                    .map(|(fv, t)| fv - 2.0 * f_par * t)
                    .collect()
            } else {
                let d_next = dist(&x, i, i + 1, dim);
                let d_prev = dist(&x, i, i - 1, dim);
                let spring = params.spring * (d_next - d_prev);
                fi.iter()
                    .zip(&tau)
                    .map(|(fv, t)| fv - f_par * t + spring * t)
                    .collect()
            };
            worst = total.iter().fold(worst, |m, v| m.max(v.abs()));
            let mut disp: Vec<f64> = total.iter().map(|v| params.step * v).collect();
            let norm = disp.iter().map(|v| v * v).sum::<f64>().sqrt();
            if norm > params.max_step {
                disp.iter_mut().for_each(|v| *v *= params.max_step / norm);
            }
            moves[i * dim..(i + 1) * dim].copy_from_slice(&disp);
        }
        if climb && worst < params.force_tolerance {
            return Ok(NebResult {
                images: x,
                energies: e,
                climbing,
                steps: step,
                converged: true,
                n_evals,
            });
        }
        for (xv, m) in x.iter_mut().zip(&moves) {
            *xv += m;
        }
    }
    model.evaluate(&x, &mut e, None)?;
    n_evals += n as u64;
    Ok(NebResult {
        images: x,
        energies: e,
        climbing,
        steps: params.max_steps,
        converged: false,
        n_evals,
    })
}

fn dist(x: &[f64], i: usize, j: usize, dim: usize) -> f64 {
    (0..dim)
        .map(|k| (x[i * dim + k] - x[j * dim + k]).powi(2))
        .sum::<f64>()
        .sqrt()
}

/// The improved tangent at image `i`: towards the higher neighbour, energy-weighted at
/// extrema, normalised.
fn tangent(x: &[f64], e: &[f64], i: usize, dim: usize) -> Vec<f64> {
    let plus: Vec<f64> = (0..dim)
        .map(|k| x[(i + 1) * dim + k] - x[i * dim + k])
        .collect();
    let minus: Vec<f64> = (0..dim)
        .map(|k| x[i * dim + k] - x[(i - 1) * dim + k])
        .collect();
    let (ep, e0, em) = (e[i + 1], e[i], e[i - 1]);
    let t: Vec<f64> = if ep > e0 && e0 > em {
        plus
    } else if ep < e0 && e0 < em {
        minus
    } else {
        let dmax = (ep - e0).abs().max((em - e0).abs());
        let dmin = (ep - e0).abs().min((em - e0).abs());
        let (wp, wm) = if ep > em { (dmax, dmin) } else { (dmin, dmax) };
        plus.iter()
            .zip(&minus)
            .map(|(p, m)| wp * p + wm * m)
            .collect()
    };
    let norm = t.iter().map(|v| v * v).sum::<f64>().sqrt().max(1e-300);
    t.into_iter().map(|v| v / norm).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::models::MullerBrown;

    /// Müller–Brown saddle between minima A and C at (−0.822002, 0.624313),
    /// E = −40.664844 (Müller & Brown 1979; recomputed from the published parameters,
    /// REFERENCES.md P + R): a straight band from A to C relaxes onto it.
    #[test]
    fn climbing_image_band_finds_the_muller_brown_a_c_saddle() {
        let (a, c) = ([-0.558224, 1.441726], [-0.050011, 0.466694]);
        let n = 17;
        let images: Vec<f64> = (0..n)
            .flat_map(|i| {
                let t = i as f64 / (n - 1) as f64;
                [a[0] + t * (c[0] - a[0]), a[1] + t * (c[1] - a[1])]
            })
            .collect();
        let r = neb(&MullerBrown, &images, &NebParams::default()).unwrap();
        assert!(r.converged, "{} steps, energies {:?}", r.steps, r.energies);
        let top = r.energies[r.climbing];
        assert!((top + 40.664844).abs() < 1e-3, "saddle energy {top}");
        let s = &r.images[r.climbing * 2..r.climbing * 2 + 2];
        assert!(
            (s[0] + 0.822002).abs() < 1e-3 && (s[1] - 0.624313).abs() < 1e-3,
            "{s:?}"
        );
    }
}
