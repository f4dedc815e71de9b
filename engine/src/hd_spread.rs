//! The expected spread of the Hellings-Downs correlation around its mean curve for a Gaussian
//! background: the cosmic variance (what remains when infinitely many pulsar pairs at one
//! separation are averaged in one realisation of the sky) and the total variance of one pair
//! (pulsar terms included), after Allen 2023 (Phys. Rev. D 107, 043018) and Allen & Romano 2023
//! (Phys. Rev. D 108, 043026). The derivation, in our words, is in docs/frequency-spread-bins.md.
//!
//! Normalisation: G(zeta) is [`hellings_downs`] (G -> 1/2 as zeta -> 0 for distinct pulsars,
//! G_aa = 1 with the pulsar term). Its Legendre series is G = sum_{l>=2} c_l P_l(cos zeta) with
//! c_l = (3/2)(2l+1)/((l-1) l (l+1) (l+2)) (Gair et al. 2014, Phys. Rev. D 90, 082001).
//!
//! For one real Gaussian mode of the background (redshifts z_a with E[z_a z_b] = A^2 G_ab),
//! Isserlis' theorem (Isserlis 1918, Biometrika 12, 134) gives for the pair products
//! rho_ab = z_a z_b:
//!
//!   Cov(rho_ab, rho_cd) = A^4 (G_ac G_bd + G_ad G_bc).
//!
//! * Total variance of one pair (c = a, d = b, pulsar terms in G_aa = G_bb = 1):
//!   sigma_tot^2(zeta) = A^4 (1 + G(zeta)^2).
//! * Cosmic variance: the variance of the average over infinitely many pairs at separation zeta
//!   is the covariance of two independent pairs at that separation averaged over their relative
//!   orientation; by the addition theorem of spherical harmonics, averaging over a uniform
//!   rotation gives <G(a.c) G(b.d)> = mu2(zeta) with
//!   mu2(zeta) = sum_l c_l^2 P_l(cos zeta)^2 / (2l + 1), so
//!   sigma_cos^2(zeta) = 2 A^4 mu2(zeta).
//!   Closed form at the ends: mu2(0) = mu2(180 deg) = (1/2) int_{-1}^{1} G^2 d(cos zeta) = 1/48.
//!
//! In the engine's reduced space a pair correlation averages many modes with the weights of
//! Z~_a Z~_b (docs/frequency-spread-bins.md): for the signal part x~_a = Z~_a s_a with
//! Cov(s_a, s_b) = A^2 G_ab I, Isserlis gives Var(rho_ab) = A^4 (G_aa G_bb / nu1_ab +
//! G_ab^2 / nu2_ab) with nu1_ab = tr(Z~_a Z~_b)^2 / tr(Z~_a^2 Z~_b^2) and
//! nu2_ab = tr(Z~_a Z~_b)^2 / tr((Z~_a Z~_b)^2): effective numbers of independent modes (2K for
//! Z~ proportional to the identity, 1 for one real mode). The band of a release uses one
//! effective number nu, the mean of 1/nu1_ab over the array's pairs, for all three terms
//! (exact when every Z~_a is proportional to one matrix, otherwise an approximation stated in
//! the outputs): sigma^2 = A^4 (...) / nu.

use crate::error::{Error, Result};
use crate::optimal::{frobenius, Weighted};
use crate::orf::hellings_downs;
use rayon::prelude::*;

/// Highest Legendre order summed in [`mu2`]; c_l^2 / (2l+1) falls as l^-7, so the tail after
/// L terms is below ~ 0.5 L^-6 (about 8e-15 at L = 200).
pub const LEGENDRE_ORDER: usize = 200;

/// The Legendre coefficient c_l of the Hellings-Downs curve (zero for l < 2; Gair et al. 2014).
pub fn hd_legendre_coefficient(l: usize) -> f64 {
    if l < 2 {
        return 0.0;
    }
    let l = l as f64;
    1.5 * (2.0 * l + 1.0) / ((l - 1.0) * l * (l + 1.0) * (l + 2.0))
}

/// mu2(zeta) = sum_l c_l^2 P_l(cos zeta)^2 / (2l + 1): the average of G(a.c) G(b.d) over the
/// relative orientation of two pairs (a, b), (c, d) that both have separation zeta.
pub fn mu2(cos_zeta: f64) -> f64 {
    let x = cos_zeta.clamp(-1.0, 1.0);
    // Bonnet's recursion (l+1) P_{l+1} = (2l+1) x P_l - l P_{l-1}.
    let (mut p_prev, mut p) = (1.0, x);
    let mut sum = 0.0;
    for l in 1..LEGENDRE_ORDER {
        let next = ((2 * l + 1) as f64 * x * p - l as f64 * p_prev) / (l + 1) as f64;
        p_prev = p;
        p = next;
        let ll = l + 1;
        let c = hd_legendre_coefficient(ll);
        sum += c * c * p * p / (2 * ll + 1) as f64;
    }
    sum
}

/// The expected spread of the Hellings-Downs correlation for an array and an amplitude.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct HdSpread {
    /// The amplitude squared the band is drawn for (the measured HD A2_hat, clamped at 0).
    pub amplitude2: f64,
    /// nu: the effective number of independent Gaussian modes of one pair correlation.
    pub effective_modes: f64,
}

impl HdSpread {
    /// sigma_cos(zeta) = A^2 (2 mu2(zeta) / nu)^(1/2).
    pub fn cosmic_sigma(&self, cos_zeta: f64) -> f64 {
        self.amplitude2 * (2.0 * mu2(cos_zeta) / self.effective_modes).sqrt()
    }

    /// sigma_tot(zeta) = A^2 ((1 + G(zeta)^2) / nu)^(1/2): one pair, pulsar terms included.
    pub fn total_sigma(&self, cos_zeta: f64) -> f64 {
        let g = hellings_downs(cos_zeta);
        self.amplitude2 * ((1.0 + g * g) / self.effective_modes).sqrt()
    }

    /// The band on a grid of `n` + 1 angles from 0 to 180 deg (rows of `hd-spread.csv`).
    pub fn rows(&self, n: usize) -> Vec<HdSpreadRow> {
        (0..=n)
            .map(|i| {
                let deg = 180.0 * i as f64 / n as f64;
                let c = deg.to_radians().cos();
                HdSpreadRow {
                    angle_deg: deg,
                    hd: self.amplitude2 * hellings_downs(c),
                    cosmic_sigma: self.cosmic_sigma(c),
                    total_sigma: self.total_sigma(c),
                }
            })
            .collect()
    }
}

/// One row of `hd-spread.csv`.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct HdSpreadRow {
    pub angle_deg: f64,
    /// A2 G(zeta): the Hellings-Downs curve at the band's amplitude.
    pub hd: f64,
    /// sigma_cos(zeta) (units of A^2, like rho).
    pub cosmic_sigma: f64,
    /// sigma_tot(zeta), pulsar terms included.
    pub total_sigma: f64,
}

/// Number of angles (plus one) of `hd-spread.csv`.
pub const BAND_STEPS: usize = 180;

/// nu from the weighted pulsars of an array: 1/nu = mean over pairs a < b of
/// tr(Z~_a^2 Z~_b^2) / tr(Z~_a Z~_b)^2 (module doc).
pub fn effective_modes(w: &[Weighted]) -> Result<f64> {
    let n = w.len();
    if n < 2 {
        return Err(Error::setting(
            "pulsars",
            "the Hellings-Downs spread needs at least two pulsars",
        ));
    }
    let squares: Vec<_> = w.par_iter().map(|x| x.z.dot(&x.z)).collect();
    let sum: f64 = (0..n)
        .into_par_iter()
        .map(|a| {
            (a + 1..n)
                .map(|b| {
                    let s = frobenius(&w[a].z, &w[b].z);
                    frobenius(&squares[a], &squares[b]) / (s * s)
                })
                .sum::<f64>()
        })
        // In pulsar order, added sequentially: thread-count independent bytes.
        .collect::<Vec<f64>>()
        .into_iter()
        .sum();
    let inv = sum / (n * (n - 1) / 2) as f64;
    if !(inv.is_finite() && inv > 0.0) {
        return Err(Error::NonFinite {
            what: "the effective number of modes of the Hellings-Downs spread".into(),
        });
    }
    Ok(1.0 / inv)
}

/// The spread for an array at amplitude squared `amplitude2` (negative values clamp to 0).
pub fn hd_spread(w: &[Weighted], amplitude2: f64) -> Result<HdSpread> {
    Ok(HdSpread {
        amplitude2: amplitude2.max(0.0),
        effective_modes: effective_modes(w)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::{stream, Purpose};
    use crate::sky::{cos_angle, isotropic_direction, Direction};
    use ndarray::{Array1, Array2};
    use rand::Rng;
    use rand_distr::StandardNormal;

    /// mu2 at the ends against the closed form (1/2) int G^2 d(cos) = 1/48 (our integration
    /// of G = 1/2 - x/4 + (3/2) x ln x over x in [0, 1] with int x^n ln^k x dx =
    /// (-1)^k k! / (n+1)^(k+1), Gradshteyn & Ryzhik 4.272), and at several angles against
    /// the same average done by quadrature: mu2(zeta) = <G(a.c) G(b.d)>, a.b = c.d = cos zeta,
    /// over a uniform relative rotation (Gauss-Legendre in the rotation's cos beta, midpoint
    /// rule in its two other Euler angles).
    #[test]
    fn mu2_matches_closed_forms_and_the_rotation_average() {
        assert!((mu2(1.0) - 1.0 / 48.0).abs() < 1e-13, "{}", mu2(1.0));
        assert!((mu2(-1.0) - 1.0 / 48.0).abs() < 1e-13);
        for deg in [20.0f64, 49.3, 82.0, 90.0, 120.0, 160.0] {
            let cz = deg.to_radians().cos();
            let want = rotation_average(cz, 64, 96);
            assert!(
                (mu2(cz) - want).abs() < 1e-4 * (1.0 / 48.0),
                "{deg} deg: series {} vs quadrature {want}",
                mu2(cz)
            );
        }
    }

    /// <G(a . R c) G(b . R d)> over rotations R (Haar measure in Euler angles z-y-z), with
    /// a = c = north pole, b = d at angle zeta in the x-z plane.
    fn rotation_average(cz: f64, n_beta: usize, n_phi: usize) -> f64 {
        let sz = (1.0 - cz * cz).sqrt();
        let a = [0.0, 0.0, 1.0];
        let b = [sz, 0.0, cz];
        let (nodes, weights) = gauss_legendre(n_beta);
        let mut acc = 0.0;
        for (u, wt) in nodes.iter().zip(&weights) {
            let (cb, sb) = (*u, (1.0 - u * u).sqrt());
            for i in 0..n_phi {
                let al = 2.0 * std::f64::consts::PI * (i as f64 + 0.5) / n_phi as f64;
                for j in 0..n_phi {
                    let ga = 2.0 * std::f64::consts::PI * (j as f64 + 0.5) / n_phi as f64;
                    let rot = euler_zyz(al, cb, sb, ga);
                    let rc = apply(&rot, &a);
                    let rd = apply(&rot, &b);
                    acc += wt
                        * hellings_downs(dot(&a, &rc).clamp(-1.0, 1.0))
                        * hellings_downs(dot(&b, &rd).clamp(-1.0, 1.0));
                }
            }
        }
        acc / (2.0 * (n_phi * n_phi) as f64)
    }

    fn euler_zyz(al: f64, cb: f64, sb: f64, ga: f64) -> [[f64; 3]; 3] {
        let (ca, sa, cg, sg) = (al.cos(), al.sin(), ga.cos(), ga.sin());
        [
            [ca * cb * cg - sa * sg, -ca * cb * sg - sa * cg, ca * sb],
            [sa * cb * cg + ca * sg, -sa * cb * sg + ca * cg, sa * sb],
            [-sb * cg, sb * sg, cb],
        ]
    }

    fn apply(r: &[[f64; 3]; 3], v: &[f64; 3]) -> [f64; 3] {
        [0, 1, 2].map(|i| r[i][0] * v[0] + r[i][1] * v[1] + r[i][2] * v[2])
    }

    fn dot(a: &[f64; 3], b: &[f64; 3]) -> f64 {
        a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
    }

    /// Gauss-Legendre nodes and weights on [-1, 1] by Newton's method on P_n (Golub & Welsch
    /// 1969 give the same nodes; common practice).
    fn gauss_legendre(n: usize) -> (Vec<f64>, Vec<f64>) {
        let mut x = Vec::with_capacity(n);
        let mut w = Vec::with_capacity(n);
        for i in 0..n {
            let mut z = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
            let mut dp = 0.0;
            for _ in 0..100 {
                let (mut p0, mut p1) = (1.0, z);
                for l in 1..n {
                    let p2 = ((2 * l + 1) as f64 * z * p1 - l as f64 * p0) / (l + 1) as f64;
                    p0 = p1;
                    p1 = p2;
                }
                dp = n as f64 * (z * p1 - p0) / (z * z - 1.0);
                let dz = p1 / dp;
                z -= dz;
                if dz.abs() < 1e-15 {
                    break;
                }
            }
            x.push(z);
            w.push(2.0 / ((1.0 - z * z) * dp * dp));
        }
        (x, w)
    }

    /// nu = 2K when every Z~ is a multiple of the identity, and 1/nu is the pair mean.
    #[test]
    fn effective_modes_of_white_reduced_data() {
        let w: Vec<Weighted> = (0..4)
            .map(|i| Weighted {
                x: Array1::zeros(6),
                z: Array2::<f64>::eye(6) * (1.0 + i as f64),
            })
            .collect();
        assert!((effective_modes(&w).unwrap() - 6.0).abs() < 1e-12);
        let s = hd_spread(&w, -1.0).unwrap();
        assert_eq!(s.amplitude2, 0.0);
        assert!(effective_modes(&w[..1]).is_err());
    }

    /// One realisation of a sky of `n_src` point sources with Gaussian plus and cross
    /// amplitudes, isotropic directions: the Earth-term redshift of pulsar p is
    /// sum_s sum_A F^A_s(p) h_s^A, F^A = (1/2) p^i p^j e^A_ij / (1 + Omega . p) for a wave
    /// travelling along Omega (Anholm et al. 2009; Hellings & Downs 1983). Amplitude variance
    /// 3 / (2 n_src) puts E[z_a z_b] = G(zeta) (the sky average of F+^2 + Fx^2 at coincidence
    /// is 1/3).
    struct Sky {
        omega: Vec<[f64; 3]>,
        eplus: Vec<[[f64; 3]; 3]>,
        ecross: Vec<[[f64; 3]; 3]>,
    }

    impl Sky {
        fn draw(n_src: usize, rng: &mut impl Rng) -> Sky {
            let scale = (1.5 / n_src as f64).sqrt();
            let mut sky = Sky {
                omega: Vec::new(),
                eplus: Vec::new(),
                ecross: Vec::new(),
            };
            for _ in 0..n_src {
                let d = isotropic_direction(rng.random(), rng.random());
                let o = d;
                // An orthonormal pair m, n perpendicular to o.
                let t = if o[2].abs() < 0.9 {
                    [0.0, 0.0, 1.0]
                } else {
                    [1.0, 0.0, 0.0]
                };
                let m = normalise(cross(&o, &t));
                let n = cross(&o, &m);
                let hp = scale * rng.sample::<f64, _>(StandardNormal);
                let hx = scale * rng.sample::<f64, _>(StandardNormal);
                let mut ep = [[0.0; 3]; 3];
                let mut ex = [[0.0; 3]; 3];
                for i in 0..3 {
                    for j in 0..3 {
                        ep[i][j] = 0.5 * hp * (m[i] * m[j] - n[i] * n[j]);
                        ex[i][j] = 0.5 * hx * (m[i] * n[j] + n[i] * m[j]);
                    }
                }
                sky.omega.push(o);
                sky.eplus.push(ep);
                sky.ecross.push(ex);
            }
            sky
        }

        fn earth_term(&self, p: &Direction) -> f64 {
            let v = *p;
            let mut z = 0.0;
            for s in 0..self.omega.len() {
                let mut q = 0.0;
                for i in 0..3 {
                    for j in 0..3 {
                        q += v[i] * v[j] * (self.eplus[s][i][j] + self.ecross[s][i][j]);
                    }
                }
                z += q / (1.0 + dot(&self.omega[s], &v));
            }
            z
        }
    }

    fn cross(a: &[f64; 3], b: &[f64; 3]) -> [f64; 3] {
        [
            a[1] * b[2] - a[2] * b[1],
            a[2] * b[0] - a[0] * b[2],
            a[0] * b[1] - a[1] * b[0],
        ]
    }

    fn normalise(v: [f64; 3]) -> [f64; 3] {
        let r = dot(&v, &v).sqrt();
        [v[0] / r, v[1] / r, v[2] / r]
    }

    /// A pulsar pair at separation zeta with uniformly random orientation.
    fn random_pair(cz: f64, rng: &mut impl Rng) -> (Direction, Direction) {
        let a = isotropic_direction(rng.random(), rng.random());
        let av = a;
        let t = if av[2].abs() < 0.9 {
            [0.0, 0.0, 1.0]
        } else {
            [1.0, 0.0, 0.0]
        };
        let u = normalise(cross(&av, &t));
        let v = cross(&av, &u);
        let phi = 2.0 * std::f64::consts::PI * rng.random::<f64>();
        let sz = (1.0 - cz * cz).sqrt();
        let b = [0, 1, 2].map(|i| cz * av[i] + sz * (phi.cos() * u[i] + phi.sin() * v[i]));
        (a, b)
    }

    /// Monte Carlo over simulated skies of point sources (one real mode). In each sky, `pairs`
    /// fresh pulsar pairs at each separation; the pair correlation is z_a z_b without pulsar
    /// terms and (z_a + q_a)(z_b + q_b) with them, q independent with the Earth term's
    /// variance G(0) = 1/2 (a pulsar term of random phase). Over skies, the average over the
    /// P pairs has mean G(zeta) and variance
    ///   Var = sigma_cos^2 + (sigma_pair^2 - sigma_cos^2) / P,
    /// sigma_cos^2 = 2 mu2(zeta), sigma_pair^2 = 1/4 + G^2 (Earth terms) or 1 + G^2 (total),
    /// and a single pair (P = 1 with pulsar terms) has variance sigma_tot^2 = 1 + G^2 (module
    /// doc). Tolerances: z = 4.4 standard errors (two-sided false-failure rate 1e-5 per
    /// check for a Gaussian estimator, 3e-4 for the 30 checks), the standard errors estimated from the samples (of
    /// the mean: s / sqrt(U); of the variance: sqrt((m4 - s^4) / U)), plus the point-source
    /// excess over the Gaussian ensemble, of relative order 1/n_src (docs/frequency-spread-bins.md),
    /// allowed as 10 / n_src.
    fn sky_monte_carlo(skies: usize, n_src: usize, pairs: usize, seed: u64) {
        let angles_deg = [10.0f64, 49.0, 82.0, 120.0, 175.0];
        // per sky and angle: pulsar-averaged Earth-term correlation, with pulsar terms, and
        // one single pair with pulsar terms.
        let results: Vec<Vec<[f64; 3]>> = (0..skies)
            .into_par_iter()
            .map(|u| {
                let mut rng = stream(seed, Purpose::Background, u as u64);
                let sky = Sky::draw(n_src, &mut rng);
                angles_deg
                    .iter()
                    .map(|deg| {
                        let cz = deg.to_radians().cos();
                        let (mut e, mut t, mut one) = (0.0, 0.0, 0.0);
                        for i in 0..pairs {
                            let (a, b) = random_pair(cz, &mut rng);
                            debug_assert!((cos_angle(&a, &b) - cz).abs() < 1e-9);
                            let (za, zb) = (sky.earth_term(&a), sky.earth_term(&b));
                            let qa = 0.5f64.sqrt() * rng.sample::<f64, _>(StandardNormal);
                            let qb = 0.5f64.sqrt() * rng.sample::<f64, _>(StandardNormal);
                            e += za * zb;
                            let full = (za + qa) * (zb + qb);
                            t += full;
                            if i == 0 {
                                one = full;
                            }
                        }
                        [e / pairs as f64, t / pairs as f64, one]
                    })
                    .collect()
            })
            .collect();
        let z = 4.4;
        let bias = 10.0 / n_src as f64;
        for (j, deg) in angles_deg.iter().enumerate() {
            let cz = deg.to_radians().cos();
            let g = hellings_downs(cz);
            let cos2 = 2.0 * mu2(cz);
            let p = pairs as f64;
            let wants = [
                cos2 + (0.25 + g * g - cos2) / p,
                cos2 + (1.0 + g * g - cos2) / p,
                1.0 + g * g,
            ];
            for (c, want_var) in wants.iter().enumerate() {
                let v: Vec<f64> = results.iter().map(|r| r[j][c]).collect();
                let n = v.len() as f64;
                let mean = v.iter().sum::<f64>() / n;
                let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
                let m4 = v.iter().map(|x| (x - mean).powi(4)).sum::<f64>() / n;
                let se_mean = (var / n).sqrt();
                let se_var = ((m4 - var * var).max(0.0) / n).sqrt();
                eprintln!(
                    "{deg} deg, column {c}: mean {mean:.4} vs G {g:.4}; variance {var:.5} vs {want_var:.5} (se {se_var:.5})"
                );
                assert!(
                    (mean - g).abs() < z * se_mean + bias * g.abs(),
                    "{deg} deg, column {c}: mean {mean} vs G = {g} (se {se_mean})"
                );
                assert!(
                    (var - want_var).abs() < z * se_var + bias * want_var,
                    "{deg} deg, column {c}: variance {var} vs {want_var} (se {se_var})"
                );
            }
        }
    }

    /// The fast sky Monte Carlo (about a second): 600 skies of 200 sources, 40 pairs per angle
    /// (it resolves the variances to about 25%; the long check to about 12%).
    #[test]
    fn spread_matches_point_source_skies() {
        sky_monte_carlo(600, 200, 40, 17);
    }

    /// The long sky Monte Carlo (about two minutes on 2 shared cores): 4000 skies of 600
    /// sources, 200 pairs per angle.
    #[test]
    #[ignore]
    fn spread_matches_point_source_skies_long() {
        sky_monte_carlo(4000, 600, 200, 18);
    }
}
