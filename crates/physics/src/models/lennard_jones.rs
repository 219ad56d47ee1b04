//! Lennard-Jones clusters of identical particles in two or three dimensions, with a
//! weak confining wall.
//!
//! U(x) = Σ_{i<j} 4 (r_ij⁻¹² − r_ij⁻⁶) + W(x), ε = σ = 1, untruncated (every pair).
//!
//! The wall keeps evaporated particles from drifting away, so that the Boltzmann density
//! of the internal coordinates is proper (normalisable):
//! W(x) = k Σ_i max(0, |x_i − x_com| − R)², a harmonic wall on each particle's distance
//! from the centre of mass, with stiffness k = 1 ε/σ² and radius
//! R = 2 + ½ N^{1/d} σ by default ([`Wall::default_radius`]). Every particle of the known
//! compact minima lies well inside R (LJ38's outermost particles are 1.8 σ from the
//! centre, R = 3.68 σ), so the wall is exactly zero there and minima energies equal the
//! published cluster energies.
//!
//! Zero modes: U is invariant under translation (the wall acts on distances from the
//! centre of mass) and rotation. Rotations form a compact group, so they cost nothing
//! but a constant. Translation is handled by working in the centre-of-mass frame:
//! [`centre_of_mass_frame`] removes it, explorers apply it to every saved frame (the
//! model reports [`EnergyModel::particle_dims`]), and the fingerprints of clusters are
//! invariant to it. The density that samplers and flows target is then the density of
//! the internal coordinates, made proper by the wall.
//!
//! The pair kernel processes eight configurations per SIMD block (see [`crate::simd`]).

use super::par_evaluate;
use crate::energy::{EnergyError, EnergyModel};
use crate::error::{require, PhysicsError};
use crate::simd::{dispatch_kernel, fma, Lanes, LANES};

/// The confining wall W = strength · Σ_i max(0, |x_i − x_com| − radius)².
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Wall {
    /// Distance from the centre of mass where the wall starts, in σ.
    pub radius: f64,
    /// Stiffness k in ε/σ²; 0 switches the wall off.
    pub strength: f64,
}

impl Wall {
    /// The default radius R = 2 + ½ N^{1/d}, generous for compact clusters of N
    /// particles in d dimensions.
    pub fn default_radius(particles: usize, dims: usize) -> f64 {
        2.0 + 0.5 * (particles as f64).powf(1.0 / dims as f64)
    }

    /// The default wall for a cluster: radius [`Wall::default_radius`], stiffness 1.
    pub fn default_for(particles: usize, dims: usize) -> Wall {
        Wall {
            radius: Wall::default_radius(particles, dims),
            strength: 1.0,
        }
    }

    /// No wall at all (plain Lennard-Jones, for comparisons with other codes).
    pub fn off() -> Wall {
        Wall {
            radius: f64::INFINITY,
            strength: 0.0,
        }
    }
}

/// A Lennard-Jones cluster of `particles` particles in `dims` dimensions; a
/// configuration is `[x_0, y_0, (z_0), x_1, ...]`, dim = particles · dims.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LennardJones {
    particles: usize,
    dims: usize,
    wall: Wall,
}

/// Floating-point operations per pair in the 3-D kernel when the pair has its own
/// division, counted by hand from `pair_kernel` (a division counts as one, a fused
/// multiply-add as two): 3 differences, 6 for r², 1 division, 2 for r⁻⁶, 3 for the
/// energy, 4 for the force scalar, 3 force components, 6 accumulations. A pair that
/// shares its division with a partner costs half a division and 1.5 multiplications
/// more, i.e. one flop more; [`LennardJones::flops_per_config`] counts both kinds.
pub const FLOPS_PER_PAIR_3D: f64 = 28.0;
/// The same count for the 2-D kernel.
pub const FLOPS_PER_PAIR_2D: f64 = 22.0;

impl LennardJones {
    /// A cluster; `particles` ≥ 2 and `dims` ∈ {2, 3}.
    pub fn new(particles: usize, dims: usize, wall: Wall) -> Result<Self, PhysicsError> {
        require(
            particles >= 2,
            "particles",
            "a cluster needs at least 2 particles",
        )?;
        require(
            dims == 2 || dims == 3,
            "dims",
            format!("must be 2 or 3, not {dims}"),
        )?;
        require(
            !wall.radius.is_nan() && wall.radius > 0.0,
            "wall_radius",
            "must be positive",
        )?;
        require(
            wall.strength.is_finite() && wall.strength >= 0.0,
            "wall_strength",
            "must be finite and non-negative",
        )?;
        Ok(LennardJones {
            particles,
            dims,
            wall,
        })
    }

    /// Number of particles.
    pub fn particles(&self) -> usize {
        self.particles
    }

    /// Spatial dimension.
    pub fn dims(&self) -> usize {
        self.dims
    }

    /// The wall in use.
    pub fn wall(&self) -> Wall {
        self.wall
    }

    /// Pairs per configuration, the unit of the benchmark's interaction rate.
    pub fn pairs(&self) -> usize {
        self.particles * (self.particles - 1) / 2
    }

    /// Floating-point operations of one energy-and-force evaluation by the hand count
    /// of the pair kernel (the wall, usually zero-cost, is not counted).
    pub fn flops_per_config(&self) -> f64 {
        let single = if self.dims == 2 {
            FLOPS_PER_PAIR_2D
        } else {
            FLOPS_PER_PAIR_3D
        };
        let mut flops = 0.0;
        for i in 0..self.particles {
            let partners = self.particles - i - 1;
            let shared = partners / 2 * 2;
            flops += shared as f64 * (single + 1.0) + (partners - shared) as f64 * single;
        }
        flops
    }

    /// Evaluates one chunk: SIMD blocks of eight configurations through the pair
    /// kernel, then the wall per configuration.
    fn block(&self, xc: &[f64], ec: &mut [f64], mut fc: Option<&mut [f64]>) {
        let dim = self.particles * self.dims;
        let n_conf = ec.len();
        let mut pos: Vec<Lanes> = vec![[0.0; LANES]; dim];
        let mut frc: Vec<Lanes> = vec![[0.0; LANES]; dim];
        let mut start = 0;
        while start < n_conf {
            let m = LANES.min(n_conf - start);
            // Unused lanes repeat the last configuration so that no lane divides by zero.
            for l in 0..LANES {
                let src = (start + l.min(m - 1)) * dim;
                for (k, p) in pos.iter_mut().enumerate() {
                    p[l] = xc[src + k];
                }
            }
            let e = pairs_simd(self.particles, self.dims, &pos, &mut frc);
            for l in 0..m {
                let c = start + l;
                let q = &xc[c * dim..(c + 1) * dim];
                match fc.as_deref_mut() {
                    Some(f) => {
                        let f = &mut f[c * dim..(c + 1) * dim];
                        for (k, fk) in f.iter_mut().enumerate() {
                            *fk = frc[k][l];
                        }
                        ec[c] = e[l] + self.wall_term(q, Some(f));
                    }
                    None => ec[c] = e[l] + self.wall_term(q, None),
                }
            }
            start += m;
        }
    }

    /// The wall energy of one configuration; adds the wall's forces to `forces`. No
    /// square root or allocation unless a particle is outside the radius, which keeps
    /// the common case (every particle inside) cheap.
    fn wall_term(&self, q: &[f64], forces: Option<&mut [f64]>) -> f64 {
        if self.wall.strength == 0.0 || self.wall.radius.is_infinite() {
            return 0.0;
        }
        let d = self.dims;
        let n = self.particles as f64;
        let mut com = [0.0; 3];
        for p in q.chunks_exact(d) {
            for c in 0..d {
                com[c] += p[c];
            }
        }
        for v in com.iter_mut() {
            *v /= n;
        }
        let r_wall2 = self.wall.radius * self.wall.radius;
        let dist2 = |p: &[f64]| {
            (0..d)
                .map(|c| (p[c] - com[c]) * (p[c] - com[c]))
                .sum::<f64>()
        };
        if q.chunks_exact(d).all(|p| dist2(p) <= r_wall2) {
            return 0.0;
        }
        // g_i = dW/dx_i holding the centre of mass fixed; the true gradient subtracts
        // the mean of g because the centre of mass moves with every particle.
        let g_of = |p: &[f64]| -> (f64, [f64; 3]) {
            let r2 = dist2(p);
            let mut g = [0.0; 3];
            if r2 <= r_wall2 {
                return (0.0, g);
            }
            let r = r2.sqrt();
            let excess = r - self.wall.radius;
            let s = 2.0 * self.wall.strength * excess / r;
            for c in 0..d {
                g[c] = s * (p[c] - com[c]);
            }
            (self.wall.strength * excess * excess, g)
        };
        let mut w = 0.0;
        let mut g_mean = [0.0; 3];
        for p in q.chunks_exact(d) {
            let (wi, g) = g_of(p);
            w += wi;
            for c in 0..d {
                g_mean[c] += g[c] / n;
            }
        }
        if let Some(f) = forces {
            for (p, fp) in q.chunks_exact(d).zip(f.chunks_exact_mut(d)) {
                let (_, g) = g_of(p);
                for c in 0..d {
                    fp[c] -= g[c] - g_mean[c];
                }
            }
        }
        w
    }
}

impl EnergyModel for LennardJones {
    fn dim(&self) -> usize {
        self.particles * self.dims
    }

    fn evaluate(
        &self,
        x: &[f64],
        energy: &mut [f64],
        forces: Option<&mut [f64]>,
    ) -> Result<(), EnergyError> {
        par_evaluate(self.dim(), x, energy, forces, |xc, ec, fc| {
            self.block(xc, ec, fc)
        })
    }

    fn particle_dims(&self) -> Option<usize> {
        Some(self.dims)
    }
}

/// Pair energies and forces of eight configurations in lanes, dispatched on dimension.
#[inline(always)]
fn pairs_lanes<const FMA: bool>(n: usize, d: usize, pos: &[Lanes], frc: &mut [Lanes]) -> Lanes {
    if d == 2 {
        pair_kernel::<2, FMA>(n, pos, frc)
    } else {
        pair_kernel::<3, FMA>(n, pos, frc)
    }
}

dispatch_kernel!(fn pairs_simd(n: usize, d: usize, pos: &[Lanes], frc: &mut [Lanes]) -> Lanes => pairs_lanes);

/// The Lennard-Jones pair sum over lanes: `pos[i * D + c][lane]` in, forces out in the
/// same layout, energies returned per lane. Every loop over `lane` is element-wise.
/// Partners j of particle i are taken two at a time so that one division serves both
/// pairs: 1/r²_a = r²_b / (r²_a r²_b) and vice versa (division is the slowest
/// instruction of the kernel; the products stay far from overflow for any finite
/// cluster).
#[inline(always)]
fn pair_kernel<const D: usize, const FMA: bool>(
    n: usize,
    pos: &[Lanes],
    frc: &mut [Lanes],
) -> Lanes {
    let pos = &pos[..n * D];
    let frc = &mut frc[..n * D];
    frc.fill([0.0; LANES]);
    let mut e = [0.0; LANES];
    for i in 0..n {
        let pi: [Lanes; D] = std::array::from_fn(|c| pos[i * D + c]);
        let mut fi = [[0.0; LANES]; D];
        let mut j = i + 1;
        while j + 1 < n {
            let (da, r2a) = separation::<D, FMA>(&pi, &pos[j * D..(j + 1) * D]);
            let (db, r2b) = separation::<D, FMA>(&pi, &pos[(j + 1) * D..(j + 2) * D]);
            let mut inv_a = [0.0; LANES];
            let mut inv_b = [0.0; LANES];
            for l in 0..LANES {
                let inv_ab = 1.0 / (r2a[l] * r2b[l]);
                inv_a[l] = r2b[l] * inv_ab;
                inv_b[l] = r2a[l] * inv_ab;
            }
            let sa = pair_terms::<FMA>(&inv_a, &mut e);
            let sb = pair_terms::<FMA>(&inv_b, &mut e);
            let (fa, fb) = frc[j * D..(j + 2) * D].split_at_mut(D);
            apply_pair::<D>(&sa, &da, &mut fi, fa);
            apply_pair::<D>(&sb, &db, &mut fi, fb);
            j += 2;
        }
        if j < n {
            let (d, r2) = separation::<D, FMA>(&pi, &pos[j * D..(j + 1) * D]);
            let mut inv = [0.0; LANES];
            for l in 0..LANES {
                inv[l] = 1.0 / r2[l];
            }
            let s = pair_terms::<FMA>(&inv, &mut e);
            apply_pair::<D>(&s, &d, &mut fi, &mut frc[j * D..(j + 1) * D]);
        }
        for c in 0..D {
            for l in 0..LANES {
                frc[i * D + c][l] += fi[c][l];
            }
        }
    }
    for v in e.iter_mut() {
        *v *= 4.0;
    }
    e
}

/// Separation vectors x_i − x_j and squared distances, per lane.
#[inline(always)]
fn separation<const D: usize, const FMA: bool>(
    pi: &[Lanes; D],
    pj: &[Lanes],
) -> ([Lanes; D], Lanes) {
    let mut dd = [[0.0; LANES]; D];
    let mut r2 = [0.0; LANES];
    for c in 0..D {
        for l in 0..LANES {
            let t = pi[c][l] - pj[c][l];
            dd[c][l] = t;
            r2[l] = fma::<FMA>(t, t, r2[l]);
        }
    }
    (dd, r2)
}

/// Adds r⁻¹² − r⁻⁶ to `e` and returns the force scalar (48 r⁻¹⁴ − 24 r⁻⁸), given 1/r².
#[inline(always)]
fn pair_terms<const FMA: bool>(inv2: &Lanes, e: &mut Lanes) -> Lanes {
    let mut s = [0.0; LANES];
    for l in 0..LANES {
        let inv6 = inv2[l] * inv2[l] * inv2[l];
        e[l] = fma::<FMA>(inv6, inv6 - 1.0, e[l]);
        s[l] = inv6 * inv2[l] * fma::<FMA>(48.0, inv6, -24.0);
    }
    s
}

/// Accumulates the pair force s·(x_i − x_j) on i (in `fi`) and its opposite on j.
#[inline(always)]
fn apply_pair<const D: usize>(s: &Lanes, dd: &[Lanes; D], fi: &mut [Lanes; D], fj: &mut [Lanes]) {
    for c in 0..D {
        for l in 0..LANES {
            let f = s[l] * dd[c][l];
            fi[c][l] += f;
            fj[c][l] -= f;
        }
    }
}

/// Moves one configuration of particles in `dims` dimensions into its centre-of-mass
/// frame (subtracts the mean position), removing the translational zero mode.
pub fn centre_of_mass_frame(x: &mut [f64], dims: usize) {
    if dims == 0 || !x.len().is_multiple_of(dims) || x.is_empty() {
        return;
    }
    let n = (x.len() / dims) as f64;
    for c in 0..dims {
        let mean = x.iter().skip(c).step_by(dims).sum::<f64>() / n;
        for v in x.iter_mut().skip(c).step_by(dims) {
            *v -= mean;
        }
    }
}

/// The 13-particle icosahedron (centre plus 12 vertices at distance `radius`), the
/// structure of the LJ13 global minimum (Wales & Doye 1997); a start for quench checks.
pub fn icosahedron_13(radius: f64) -> Vec<f64> {
    let phi = (1.0 + 5f64.sqrt()) / 2.0;
    let norm = (1.0 + phi * phi).sqrt();
    let mut x = vec![0.0, 0.0, 0.0];
    for &a in &[-1.0, 1.0] {
        for &b in &[-phi, phi] {
            // The three cyclic permutations of (0, ±1, ±φ).
            for v in [[0.0, a, b], [a, b, 0.0], [b, 0.0, a]] {
                x.extend(v.iter().map(|c| c * radius / norm));
            }
        }
    }
    x
}

/// The seven-particle pentagonal bipyramid with nearest-neighbour distance `nn`, the
/// structure of the LJ7 global minimum.
pub fn pentagonal_bipyramid_7(nn: f64) -> Vec<f64> {
    let ring = nn / (2.0 * (std::f64::consts::PI / 5.0).sin());
    let apex = (nn * nn - ring * ring).sqrt();
    let mut x = vec![0.0, 0.0, apex, 0.0, 0.0, -apex];
    for k in 0..5 {
        let a = 2.0 * std::f64::consts::PI * k as f64 / 5.0;
        x.extend([ring * a.cos(), ring * a.sin(), 0.0]);
    }
    x
}

/// The 38-particle fcc truncated octahedron with nearest-neighbour distance `nn`, the
/// structure of the LJ38 global minimum: the fcc sites (integer points with even
/// coordinate sum, nearest neighbours √2 apart) in the first three shells around an
/// octahedral hole, 6 + 8 + 24 = 38 sites at squared distances 1, 3 and 5.
pub fn truncated_octahedron_38(nn: f64) -> Vec<f64> {
    let scale = nn / 2f64.sqrt();
    let mut x = Vec::with_capacity(38 * 3);
    for i in -3i32..=3 {
        for j in -3i32..=3 {
            for k in -3i32..=3 {
                // The hole sits at (1, 0, 0); shift so that it is the origin.
                let (a, b, c) = (i + 1, j, k);
                if (a + b + c).rem_euclid(2) != 0 {
                    continue;
                }
                let d2 = i * i + j * j + k * k;
                if d2 == 1 || d2 == 3 || d2 == 5 {
                    x.extend([i as f64 * scale, j as f64 * scale, k as f64 * scale]);
                }
            }
        }
    }
    x
}

/// The two-dimensional seven-particle hexagon with a centre particle, nearest-neighbour
/// distance `nn`: the 2-D LJ7 global minimum (Dellago, Bolhuis & Chandler 1998).
pub fn centred_hexagon_7(nn: f64) -> Vec<f64> {
    let mut x = vec![0.0, 0.0];
    for k in 0..6 {
        let a = std::f64::consts::PI * k as f64 / 3.0;
        x.extend([nn * a.cos(), nn * a.sin()]);
    }
    x
}

/// A compact cluster of `particles` particles: the lattice sites (triangular lattice in
/// 2-D, fcc in 3-D, nearest neighbours `nn` apart) closest to the origin, ties broken by
/// coordinates so the choice is deterministic, moved to the centre-of-mass frame. A
/// start for explorers of any cluster size.
pub fn compact_cluster(particles: usize, dims: usize, nn: f64) -> Vec<f64> {
    let reach = (particles as f64).powf(1.0 / dims.max(1) as f64).ceil() as i64 + 2;
    let mut sites: Vec<Vec<f64>> = Vec::new();
    if dims == 2 {
        for i in -reach..=reach {
            for j in -reach..=reach {
                let (a, b) = (i as f64, j as f64);
                sites.push(vec![nn * (a + 0.5 * b), nn * b * 3f64.sqrt() / 2.0]);
            }
        }
    } else {
        // fcc: integer points with even coordinate sum, nearest neighbours √2 apart.
        let scale = nn / 2f64.sqrt();
        for i in -2 * reach..=2 * reach {
            for j in -2 * reach..=2 * reach {
                for k in -2 * reach..=2 * reach {
                    if (i + j + k).rem_euclid(2) == 0 {
                        sites.push(vec![i as f64 * scale, j as f64 * scale, k as f64 * scale]);
                    }
                }
            }
        }
    }
    let norm2 = |p: &Vec<f64>| p.iter().map(|v| v * v).sum::<f64>();
    sites.sort_by(|a, b| {
        norm2(a).total_cmp(&norm2(b)).then_with(|| {
            a.iter()
                .zip(b)
                .map(|(x, y)| x.total_cmp(y))
                .find(|o| o.is_ne())
                .unwrap_or(std::cmp::Ordering::Equal)
        })
    });
    let mut x: Vec<f64> = sites.into_iter().take(particles).flatten().collect();
    centre_of_mass_frame(&mut x, dims);
    x
}
