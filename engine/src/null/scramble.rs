//! Sky scrambles (Cornish & Sampson 2016; Taylor et al. 2017): move every pulsar to an isotropic
//! random position and recompute the optimal statistic with the same rho_ab and sigma_ab. Only
//! the pattern values G'_ab change, so a trial costs O(pairs):
//!     SNR' = sum G' rho/sigma^2 / (sum G'^2 / sigma^2)^(1/2)      (Chamberlin et al. 2015)
//! A scramble is kept when its match with the true pattern (docs/null.md),
//!     M = sum G G' / (sum G^2 sum G'^2)^(1/2)       (unweighted, as in Taylor et al. 2017)
//! has |M| below the threshold: an anti-matching scramble carries the true pattern as much as a
//! matching one (our choice, documented in docs/null.md).

use super::{Control, NullSettings, Prepared, Trial, TrialSource};
use crate::error::{Error, Result};
use crate::orf::Pattern;
use crate::rng::{stream, Purpose};
use rand::Rng;

/// Draws allowed for one trial before the threshold is declared unreachable.
pub const MAX_ATTEMPTS: u64 = 100_000;

/// ln x for positive normal x, branch-free so that loops over it vectorise: x = m 2^e with
/// m in [sqrt(1/2), sqrt(2)), ln m = 2 atanh(s) = 2 (s + s^3/3 + ...), s = (m - 1)/(m + 1),
/// |s| <= 0.1716, ten terms (truncation below 1e-16; Abramowitz & Stegun 1964, 4.1.28 with
/// z = m, the series of ln((1+s)/(1-s))).
#[inline(always)]
pub fn fast_ln(x: f64) -> f64 {
    const SQRT2: f64 = std::f64::consts::SQRT_2;
    const LN2: f64 = std::f64::consts::LN_2;
    let bits = x.to_bits();
    // The biased exponent as an exact f64 without an integer conversion instruction.
    let e = f64::from_bits(0x4330_0000_0000_0000 | (bits >> 52)) - 4_503_599_627_370_496.0 - 1023.0;
    let m = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    let big = m > SQRT2;
    let m = if big { 0.5 * m } else { m };
    let e = if big { e + 1.0 } else { e };
    let s = (m - 1.0) / (m + 1.0);
    let s2 = s * s;
    let mut p = 1.0 / 19.0;
    for c in [17.0, 15.0, 13.0, 11.0, 9.0, 7.0, 5.0, 3.0, 1.0] {
        p = p * s2 + 1.0 / c;
    }
    e * LN2 + 2.0 * s * p
}

/// Hellings-Downs G(zeta) = 1/2 - x/4 + (3/2) x ln x, x = (1 - cos zeta)/2 (Hellings & Downs
/// 1983), with [`fast_ln`]; G = 1/2 at x = 0.
#[inline(always)]
pub fn hd_fast(cos_zeta: f64) -> f64 {
    let x = 0.5 * (1.0 - cos_zeta.clamp(-1.0, 1.0));
    let xs = x.max(1e-300);
    0.5 - 0.25 * x + 1.5 * xs * fast_ln(xs)
}

/// Lanes of the fixed-order sums: lane l adds the terms whose index in the pair array is
/// l mod 8, and the lanes are added in a fixed tree at the end. The order is a function of the
/// array size alone, so a trial's sums are the same numbers on every thread, machine and
/// instruction set (the compiler neither reorders nor fuses floating-point operations).
const LANES: usize = 8;

/// (cos 2 pi v, sin 2 pi v) for v in [0, 1), branch-free so that loops over it vectorise:
/// 4 v = n + 4 f with n the nearest integer (exact, by adding 1.5 2^52) and |f| <= 1/8, so
/// theta = 2 pi f is in [-pi/4, pi/4]; sin and cos of theta from their Taylor series to
/// theta^15 and theta^16 (truncation below 5e-17; Abramowitz & Stegun 1964, 4.3.65 and 4.3.66),
/// then rotated by the quadrant n mod 4. Agrees with the platform's sin/cos of 2 pi v to 1e-15
/// (test; most of that is the rounding of the reference's own argument 2 pi v, up to 4.4e-16).
#[inline(always)]
pub fn cos_sin_turn(v: f64) -> (f64, f64) {
    const MAGIC: f64 = 6_755_399_441_055_744.0; // 1.5 * 2^52: its ulp is 1
    const S: [f64; 7] = [
        -1.0 / 6.0,
        1.0 / 120.0,
        -1.0 / 5040.0,
        1.0 / 362_880.0,
        -1.0 / 39_916_800.0,
        1.0 / 6_227_020_800.0,
        -1.0 / 1_307_674_368_000.0,
    ];
    const C: [f64; 8] = [
        -1.0 / 2.0,
        1.0 / 24.0,
        -1.0 / 720.0,
        1.0 / 40_320.0,
        -1.0 / 3_628_800.0,
        1.0 / 479_001_600.0,
        -1.0 / 87_178_291_200.0,
        1.0 / 20_922_789_888_000.0,
    ];
    let t = 4.0 * v;
    let r = t + MAGIC;
    let q = r.to_bits() & 3;
    let f = (t - (r - MAGIC)) * 0.25;
    let th = f * std::f64::consts::TAU;
    let t2 = th * th;
    let mut ps = S[6];
    for c in [S[5], S[4], S[3], S[2], S[1], S[0]] {
        ps = ps * t2 + c;
    }
    let s = th + th * t2 * ps;
    let mut pc = C[7];
    for c in [C[6], C[5], C[4], C[3], C[2], C[1], C[0]] {
        pc = pc * t2 + c;
    }
    let c = 1.0 + t2 * pc;
    // Quadrant q: cos(q pi/2 + theta), sin(q pi/2 + theta) = (c, s), (-s, c), (-c, -s), (s, -c).
    let (a, b) = if q & 1 == 1 { (s, c) } else { (c, s) };
    let ca = if q == 1 || q == 2 { -a } else { a };
    let sb = if q >= 2 { -b } else { b };
    (ca, sb)
}

/// Isotropic unit vectors from uniforms u, v in [0, 1): z = 2u - 1, azimuth 2 pi v (the same map
/// as [`crate::sky::isotropic_direction`], with [`cos_sin_turn`] for the azimuth).
#[inline(always)]
fn directions(u: &[f64], v: &[f64], x: &mut [f64], y: &mut [f64], z: &mut [f64]) {
    for ((((u, v), x), y), z) in u.iter().zip(v).zip(x).zip(y).zip(z) {
        let zz = 2.0 * u - 1.0;
        let r = (1.0 - zz * zz).max(0.0).sqrt();
        let (c, s) = cos_sin_turn(*v);
        *x = r * c;
        *y = r * s;
        *z = zz;
    }
}

/// Add the lanes in a fixed tree.
#[inline(always)]
fn lane_sum(a: &[f64; LANES]) -> f64 {
    ((a[0] + a[1]) + (a[2] + a[3])) + ((a[4] + a[5]) + (a[6] + a[7]))
}

/// The pair arrays of the kernels are padded: row a (pairs a < b) starts at a multiple of
/// [`LANES`] and is followed by zeros up to the next multiple, so that every row is whole
/// vectors (no scalar remainder) and a sum over the padded array is the sum over the pairs.
/// Returns each row's start and the padded length.
fn padded_rows(n: usize) -> (Vec<usize>, usize) {
    let mut starts = Vec::with_capacity(n);
    let mut k = 0;
    for a in 0..n {
        starts.push(k);
        k += (n - a - 1).div_ceil(LANES) * LANES;
    }
    (starts, k)
}

/// Row-major pair values (a < b) in the padded layout of [`padded_rows`].
fn pad(values: &[f64], n: usize) -> Vec<f64> {
    let (starts, total) = padded_rows(n);
    let mut out = vec![0.0; total];
    let mut k = 0;
    for a in 0..n {
        let len = n - a - 1;
        out[starts[a]..starts[a] + len].copy_from_slice(&values[k..k + len]);
        k += len;
    }
    out
}

/// G'_ab of the scramble with directions (x, y, z) into `g` (padded rows; x, y, z hold
/// [`LANES`] zeros after the n pulsars, and the padding of `g` is set to zero). Each row is one
/// element-wise loop over whole vectors, which the compiler vectorises.
#[inline(always)]
fn pattern_pass<F: Fn(f64) -> f64>(f: F, n: usize, x: &[f64], y: &[f64], z: &[f64], g: &mut [f64]) {
    let mut k = 0;
    for a in 0..n {
        let len = n - a - 1;
        let plen = len.div_ceil(LANES) * LANES;
        let (xa, ya, za) = (x[a], y[a], z[a]);
        let row = &mut g[k..k + plen];
        let (xb, yb, zb) = (
            &x[a + 1..a + 1 + plen],
            &y[a + 1..a + 1 + plen],
            &z[a + 1..a + 1 + plen],
        );
        for j in 0..plen {
            row[j] = f(xa * xb[j] + ya * yb[j] + za * zb[j]);
        }
        row[len..].fill(0.0);
        k += plen;
    }
}

/// sum_i a_i b_i (times c_i when given) in [`LANES`] lanes of fixed order.
#[inline(always)]
fn lane_dot(a: &[f64], b: &[f64], c: Option<&[f64]>) -> f64 {
    let mut s = [0.0; LANES];
    let full = a.len() / LANES * LANES;
    match c {
        None => {
            for (ac, bc) in a[..full]
                .chunks_exact(LANES)
                .zip(b[..full].chunks_exact(LANES))
            {
                let ac: &[f64; LANES] = ac.try_into().expect("chunk of LANES");
                let bc: &[f64; LANES] = bc.try_into().expect("chunk of LANES");
                for l in 0..LANES {
                    s[l] += ac[l] * bc[l];
                }
            }
            for j in full..a.len() {
                s[j - full] += a[j] * b[j];
            }
        }
        Some(c) => {
            for ((ac, bc), cc) in a[..full]
                .chunks_exact(LANES)
                .zip(b[..full].chunks_exact(LANES))
                .zip(c[..full].chunks_exact(LANES))
            {
                let ac: &[f64; LANES] = ac.try_into().expect("chunk of LANES");
                let bc: &[f64; LANES] = bc.try_into().expect("chunk of LANES");
                let cc: &[f64; LANES] = cc.try_into().expect("chunk of LANES");
                for l in 0..LANES {
                    s[l] += ac[l] * bc[l] * cc[l];
                }
            }
            for j in full..a.len() {
                s[j - full] += a[j] * b[j] * c[j];
            }
        }
    }
    lane_sum(&s)
}

/// The sums of one candidate over the padded pair array in two flat passes: the cosines of
/// every row in whole vectors of [`LANES`] (fixed-size arrays, so no row ends in a scalar
/// remainder), then the pattern and the four sums over the whole array in one long loop (which
/// the compiler vectorises and the processor overlaps across iterations: in rows of a few
/// vectors the pattern's long dependency chain and the loop's set-up were not hidden).
/// Lane l of each sum adds the terms at indices l mod [`LANES`] in order: the same terms in the
/// same order as [`lane_dot`] over the values of [`pattern_pass`], so the results are bit for
/// bit those of the separate passes (test `fused_pass_is_the_passes`). `valid` is 1 at a pair
/// and 0 in the padding (G' x 1 is G' exactly; the padding's G' becomes 0 as in
/// [`pattern_pass`]). Returns (sum G' G, sum G'^2, sum G' num_ab, sum G'^2 tr_ab).
#[inline(always)]
fn fused_pass<F: Fn(f64) -> f64>(
    f: F,
    n: usize,
    x: &[f64],
    y: &[f64],
    z: &[f64],
    t: &Tables,
    g: &mut [f64],
) -> [f64; 4] {
    let mut k = 0;
    for a in 0..n {
        let plen = (n - a - 1).div_ceil(LANES) * LANES;
        let (xa, ya, za) = (x[a], y[a], z[a]);
        for c in 0..plen / LANES {
            let r = a + 1 + c * LANES..a + 1 + (c + 1) * LANES;
            let lane = |v: &[f64]| -> [f64; LANES] { v[r.clone()].try_into().expect("LANES") };
            let (xb, yb, zb) = (lane(x), lane(y), lane(z));
            let out: &mut [f64; LANES] = (&mut g[k + c * LANES..k + (c + 1) * LANES])
                .try_into()
                .expect("LANES");
            for l in 0..LANES {
                out[l] = xa * xb[l] + ya * yb[l] + za * zb[l];
            }
        }
        k += plen;
    }
    // The pattern and the four sums in one long loop: four independent chains of additions
    // per lane (one chain per sum, as four separate passes had, but overlapped instead of each
    // waiting on its own additions' latency), the same terms in the same order.
    let mut sums = [[0.0f64; LANES]; 4];
    let chunks = g[..k]
        .chunks_exact(LANES)
        .zip(t.valid[..k].chunks_exact(LANES))
        .zip(t.g_true[..k].chunks_exact(LANES))
        .zip(t.numerators[..k].chunks_exact(LANES))
        .zip(t.traces[..k].chunks_exact(LANES));
    for ((((gc, ok), gt), num), tr) in chunks {
        for l in 0..LANES {
            let v = f(gc[l]) * ok[l];
            sums[0][l] += v * gt[l];
            sums[1][l] += v * v;
            sums[2][l] += v * num[l];
            sums[3][l] += v * v * tr[l];
        }
    }
    [
        lane_sum(&sums[0]),
        lane_sum(&sums[1]),
        lane_sum(&sums[2]),
        lane_sum(&sums[3]),
    ]
}

/// Pair values in the padded layout of the kernels.
struct Tables {
    /// G_ab of the true pattern.
    g_true: Vec<f64>,
    /// X_a^T Phi X_b of the data.
    numerators: Vec<f64>,
    /// 1/sigma_ab^2.
    traces: Vec<f64>,
    /// 1 at a pair, 0 in the padding.
    valid: Vec<f64>,
}

/// (sum G' num_ab, sum G'^2 tr_ab) over the flat pair array.
#[inline(always)]
fn statistic_pass(g: &[f64], num: &[f64], tr: &[f64]) -> (f64, f64) {
    (lane_dot(g, num, None), lane_dot(g, g, Some(tr)))
}

/// One candidate scramble: directions from the uniforms, pattern values and the match sums
/// (sum G' G, sum G'^2).
#[inline(always)]
fn candidate(pattern: Pattern, g_true: &[f64], w: &mut Work) -> (f64, f64) {
    let n = w.uv.len() / 2;
    directions(
        &w.uv[..n],
        &w.uv[n..],
        &mut w.x[..n],
        &mut w.y[..n],
        &mut w.z[..n],
    );
    match pattern {
        Pattern::Dipole => pattern_pass(|c| c.clamp(-1.0, 1.0), n, &w.x, &w.y, &w.z, &mut w.g),
        Pattern::Monopole => pattern_pass(|_| 1.0, n, &w.x, &w.y, &w.z, &mut w.g),
        Pattern::Hd => pattern_pass(hd_fast, n, &w.x, &w.y, &w.z, &mut w.g),
    }
    (lane_dot(&w.g, g_true, None), lane_dot(&w.g, &w.g, None))
}

/// One candidate scramble in one pass: directions from the uniforms and the four sums of
/// [`fused_pass`] (the pattern values are not stored).
#[inline(always)]
fn candidate_fused(pattern: Pattern, t: &Tables, w: &mut Work) -> [f64; 4] {
    let n = w.uv.len() / 2;
    directions(
        &w.uv[..n],
        &w.uv[n..],
        &mut w.x[..n],
        &mut w.y[..n],
        &mut w.z[..n],
    );
    match pattern {
        Pattern::Dipole => fused_pass(|c| c.clamp(-1.0, 1.0), n, &w.x, &w.y, &w.z, t, &mut w.g),
        Pattern::Monopole => fused_pass(|_| 1.0, n, &w.x, &w.y, &w.z, t, &mut w.g),
        Pattern::Hd => fused_pass(hd_fast, n, &w.x, &w.y, &w.z, t, &mut w.g),
    }
}

/// The instruction sets the kernels are compiled for; the best one the CPU has is picked at run
/// time. The source is the same and the compiler neither reorders nor fuses floating-point
/// operations, so every version returns the same bits (test `kernels_agree_bit_for_bit`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Isa {
    Baseline,
    #[cfg(target_arch = "x86_64")]
    Avx2,
    #[cfg(target_arch = "x86_64")]
    Avx512,
}

impl Isa {
    /// The widest version this CPU runs.
    pub fn detect() -> Isa {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx512f") {
                return Isa::Avx512;
            }
            if std::arch::is_x86_feature_detected!("avx2") {
                return Isa::Avx2;
            }
        }
        Isa::Baseline
    }

    /// Every version this CPU runs.
    pub fn available() -> Vec<Isa> {
        let mut v = vec![Isa::Baseline];
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                v.push(Isa::Avx2);
            }
            if std::arch::is_x86_feature_detected!("avx512f") {
                v.push(Isa::Avx512);
            }
        }
        v
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn candidate_avx2(pattern: Pattern, g_true: &[f64], w: &mut Work) -> (f64, f64) {
    candidate(pattern, g_true, w)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn candidate_avx512(pattern: Pattern, g_true: &[f64], w: &mut Work) -> (f64, f64) {
    candidate(pattern, g_true, w)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn fused_avx2(pattern: Pattern, t: &Tables, w: &mut Work) -> [f64; 4] {
    candidate_fused(pattern, t, w)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn fused_avx512(pattern: Pattern, t: &Tables, w: &mut Work) -> [f64; 4] {
    candidate_fused(pattern, t, w)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn statistic_avx2(g: &[f64], num: &[f64], tr: &[f64]) -> (f64, f64) {
    statistic_pass(g, num, tr)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn statistic_avx512(g: &[f64], num: &[f64], tr: &[f64]) -> (f64, f64) {
    statistic_pass(g, num, tr)
}

/// Scratch space of one trial (no allocation per draw).
struct Work {
    /// u_a then v_a of every pulsar.
    uv: Vec<f64>,
    /// Directions, with [`LANES`] zeros after the n pulsars.
    x: Vec<f64>,
    y: Vec<f64>,
    z: Vec<f64>,
    /// Pattern values in the padded layout of [`padded_rows`].
    g: Vec<f64>,
}

impl Work {
    fn new(n: usize) -> Work {
        Work {
            uv: vec![0.0; 2 * n],
            x: vec![0.0; n + LANES],
            y: vec![0.0; n + LANES],
            z: vec![0.0; n + LANES],
            g: vec![0.0; padded_rows(n).1],
        }
    }
}

/// Sums of one scramble.
#[derive(Clone, Copy, Debug, Default)]
struct Sums {
    /// sum G' rho/sigma^2 = sum G' num_ab.
    num: f64,
    /// sum G'^2 / sigma^2.
    den: f64,
}

/// Sky scrambles of a prepared array.
pub struct Scrambles<'a> {
    p: &'a Prepared,
    pattern: Pattern,
    seed: u64,
    threshold: f64,
    /// sum G^2 of the true pattern.
    g2_true: f64,
    /// G_ab, num_ab and tr_ab in the padded layout of the kernels.
    tables: Tables,
    isa: Isa,
}

impl<'a> Scrambles<'a> {
    pub fn new(p: &'a Prepared, pattern: Pattern, seed: u64, threshold: f64) -> Result<Self> {
        if pattern == Pattern::Monopole {
            return Err(Error::setting(
                "pattern",
                "sky scrambles leave the monopole unchanged",
            ));
        }
        Ok(Scrambles {
            p,
            pattern,
            seed,
            threshold,
            g2_true: p.g.iter().map(|g| g * g).sum(),
            tables: Tables {
                g_true: pad(&p.g, p.n),
                numerators: pad(&p.numerators, p.n),
                traces: pad(&p.traces, p.n),
                valid: pad(&vec![1.0; p.g.len()], p.n),
            },
            isa: Isa::detect(),
        })
    }

    /// The same scrambles computed with the kernels of instruction set `isa` (for tests and
    /// benchmarks; `isa` must be one of [`Isa::available`]).
    pub fn with_isa(mut self, isa: Isa) -> Self {
        if Isa::available().contains(&isa) {
            self.isa = isa;
        }
        self
    }

    /// Draw the uniforms of one candidate: u_a, v_a for every pulsar in turn (the stream's
    /// order since the first version of scrambles).
    fn draw(&self, rng: &mut impl Rng, w: &mut Work) {
        let n = self.p.n;
        for a in 0..n {
            w.uv[a] = rng.random();
            w.uv[n + a] = rng.random();
        }
    }

    /// Directions, pattern values and (sum G' G, sum G'^2) of the drawn candidate.
    fn candidate(&self, w: &mut Work) -> (f64, f64) {
        match self.isa {
            Isa::Baseline => candidate(self.pattern, &self.tables.g_true, w),
            // SAFETY: `isa` is only ever a set the CPU reported (`Isa::detect`, `with_isa`).
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => unsafe { candidate_avx2(self.pattern, &self.tables.g_true, w) },
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => unsafe { candidate_avx512(self.pattern, &self.tables.g_true, w) },
        }
    }

    /// Directions and the four sums of [`fused_pass`] of the drawn candidate.
    fn candidate_fused(&self, w: &mut Work) -> [f64; 4] {
        match self.isa {
            Isa::Baseline => candidate_fused(self.pattern, &self.tables, w),
            // SAFETY: as in `candidate`.
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => unsafe { fused_avx2(self.pattern, &self.tables, w) },
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => unsafe { fused_avx512(self.pattern, &self.tables, w) },
        }
    }

    /// (sum G' num, sum G'^2 tr) of the pattern values in `g`.
    fn statistic(&self, g: &[f64]) -> Sums {
        let (num, tr) = (&self.tables.numerators, &self.tables.traces);
        let (num, den) = match self.isa {
            Isa::Baseline => statistic_pass(g, num, tr),
            // SAFETY: as in `candidate`.
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => unsafe { statistic_avx2(g, num, tr) },
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => unsafe { statistic_avx512(g, num, tr) },
        };
        Sums { num, den }
    }

    /// Draw candidates from trial `index`'s stream until one is accepted; its attempt number
    /// and sums (its directions are left in `w`). The statistic's sums are computed with the
    /// match sums in one pass (kept only for the accepted candidate).
    fn accepted_candidate(&self, index: u64, w: &mut Work) -> Result<(u64, Sums)> {
        let mut rng = stream(self.seed, Purpose::Scramble, index);
        for attempt in 1..=MAX_ATTEMPTS {
            self.draw(&mut rng, w);
            let [cross, g2, num, den] = self.candidate_fused(w);
            if self.accepted(cross, g2) {
                return Ok((attempt, Sums { num, den }));
            }
        }
        Err(Error::setting(
            "match-threshold",
            format!(
                "no scramble of {MAX_ATTEMPTS} draws had |match| below {}; raise the threshold",
                self.threshold
            ),
        ))
    }

    /// The directions of trial `index`'s accepted scramble (replaying its stream).
    pub fn accepted_directions(&self, index: u64) -> Result<Vec<crate::sky::Direction>> {
        let mut w = Work::new(self.p.n);
        self.accepted_candidate(index, &mut w)?;
        Ok((0..self.p.n).map(|a| [w.x[a], w.y[a], w.z[a]]).collect())
    }

    fn accepted(&self, cross: f64, g2: f64) -> bool {
        self.threshold >= 1.0 || match_value(cross, g2, self.g2_true).abs() < self.threshold
    }
}

fn match_value(cross: f64, g2: f64, g2_true: f64) -> f64 {
    let d = (g2 * g2_true).sqrt();
    if d > 0.0 {
        cross / d
    } else {
        0.0
    }
}

impl TrialSource for Scrambles<'_> {
    fn trial(&self, index: u64) -> Result<Trial> {
        // One work space per thread, reused from trial to trial (a trial overwrites every
        // value it reads, so the numbers do not depend on what ran before on the thread).
        thread_local! {
            static WORK: std::cell::RefCell<Option<Work>> = const { std::cell::RefCell::new(None) };
        }
        let n = self.p.n;
        let (attempts, s) = WORK.with(|cell| {
            let mut cell = cell.borrow_mut();
            let w = match cell.as_mut() {
                Some(w) if w.uv.len() == 2 * n => w,
                _ => cell.insert(Work::new(n)),
            };
            self.accepted_candidate(index, w)
        })?;
        Ok(Trial {
            index,
            snr: s.num / s.den.sqrt(),
            amplitude2: s.num / s.den,
            attempts,
        })
    }
}

/// Scrambles that must also have |match| below the threshold against every earlier accepted
/// scramble (Taylor et al. 2017 discuss this stricter set). Sequential: trial i depends on the
/// trials before it, so it cannot be sharded or resumed; it costs O(N_accepted * pairs) per
/// candidate (O(N^2 pairs) in all) and keeps N normalised pattern vectors (8 N pairs bytes).
/// Candidates are the draws of the streams (seed, i) in order; the threshold on a candidate
/// must hold for every pair.
pub fn mutual(p: &Prepared, settings: &NullSettings, control: Control) -> Result<Vec<Trial>> {
    let thr = settings.match_threshold.unwrap_or(1.0);
    let s = Scrambles::new(p, settings.pattern, settings.seed, thr)?;
    let mut w = Work::new(p.n);
    let mut kept: Vec<Vec<f64>> = Vec::new();
    let mut out = Vec::new();
    for index in 0..settings.trials {
        let mut rng = stream(settings.seed, Purpose::Scramble, index);
        let mut done = false;
        for attempt in 1..=MAX_ATTEMPTS {
            s.draw(&mut rng, &mut w);
            let (cross, g2) = s.candidate(&mut w);
            if !s.accepted(cross, g2) {
                continue;
            }
            let sums = s.statistic(&w.g);
            let norm = g2.sqrt();
            if norm == 0.0 {
                continue;
            }
            let unit: Vec<f64> = w.g.iter().map(|v| v / norm).collect();
            if kept
                .iter()
                .any(|k| super::dot(k, &unit).abs() >= thr && thr < 1.0)
            {
                continue;
            }
            kept.push(unit);
            out.push(Trial {
                index,
                snr: sums.num / sums.den.sqrt(),
                amplitude2: sums.num / sums.den,
                attempts: attempt,
            });
            done = true;
            break;
        }
        if !done {
            return Err(Error::setting(
                "match-threshold",
                format!(
                    "trial {index}: no scramble of {MAX_ATTEMPTS} draws had |match| below {thr} against the pattern and the {} earlier scrambles; lower --trials or raise the threshold",
                    kept.len()
                ),
            ));
        }
        if let Some(c) = control.cancel {
            if c.load(std::sync::atomic::Ordering::SeqCst) {
                return Err(Error::setting(
                    "interrupted",
                    "mutual-match scrambles cannot be resumed; rerun from the start",
                ));
            }
        }
        if let Some(pr) = control.progress {
            if index % 64 == 63 || index + 1 == settings.trials {
                pr(index + 1, settings.trials);
            }
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::orf::hellings_downs;

    #[test]
    fn fast_log_agrees_with_libm() {
        // Against the platform's ln (glibc/libm, correctly rounded to within 1 ulp).
        let mut worst: f64 = 0.0;
        let mut x = 1e-300;
        while x < 1e3 {
            for f in [1.0, 1.0001, 1.37, 1.414, 1.415, 1.9999] {
                let y = x * f;
                worst = worst.max((fast_ln(y) - y.ln()).abs() / y.ln().abs().max(1.0));
            }
            x *= 1.7;
        }
        assert!(worst < 4e-16, "relative error {worst}");
    }

    #[test]
    fn turn_sine_and_cosine_agree_with_libm() {
        // Against the platform's sin/cos (glibc/libm, within 1 ulp) on dyadic v as the
        // generator makes them, including the quadrant edges.
        let mut worst: f64 = 0.0;
        let mut check = |v: f64| {
            let (c, s) = cos_sin_turn(v);
            let a = std::f64::consts::TAU * v;
            worst = worst.max((c - a.cos()).abs()).max((s - a.sin()).abs());
            assert!((c * c + s * s - 1.0).abs() < 1e-15, "{v}");
        };
        for i in 0..=80 {
            check(i as f64 / 80.0 * (1.0 - f64::EPSILON));
        }
        let mut r = crate::rng::stream(1, Purpose::Scramble, 0);
        for _ in 0..200_000 {
            check(r.random());
        }
        // The reference's argument TAU * v is itself rounded (half an ulp of 2 pi: 4.4e-16).
        assert!(worst < 1e-15, "absolute error {worst}");
    }

    #[test]
    fn directions_are_the_isotropic_map() {
        let mut r = crate::rng::stream(2, Purpose::Scramble, 0);
        let n = 257;
        let (u, v): (Vec<f64>, Vec<f64>) = (0..n)
            .map(|_| (r.random::<f64>(), r.random::<f64>()))
            .unzip();
        let (mut x, mut y, mut z) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        directions(&u, &v, &mut x, &mut y, &mut z);
        for a in 0..n {
            let d = crate::sky::isotropic_direction(u[a], v[a]);
            let e = [x[a], y[a], z[a]];
            for c in 0..3 {
                assert!((d[c] - e[c]).abs() < 1e-15, "{a} {c}");
            }
        }
    }

    #[test]
    fn kernels_agree_bit_for_bit() {
        // Every instruction set the CPU has gives the same bits as the baseline build, for
        // both patterns, on an array whose rows are not multiples of the lane count; and the
        // padded pattern values are the closed-form pattern of the directions, pair by pair.
        let n = 37;
        let pairs = n * (n - 1) / 2;
        let mut r = crate::rng::stream(3, Purpose::Scramble, 0);
        let g_true = pad(
            &(0..pairs)
                .map(|_| r.random::<f64>() - 0.3)
                .collect::<Vec<_>>(),
            n,
        );
        let num = pad(
            &(0..pairs)
                .map(|_| r.random::<f64>() - 0.5)
                .collect::<Vec<_>>(),
            n,
        );
        let tr = pad(
            &(0..pairs).map(|_| r.random::<f64>()).collect::<Vec<_>>(),
            n,
        );
        let uv: Vec<f64> = (0..2 * n).map(|_| r.random()).collect();
        for pattern in [Pattern::Hd, Pattern::Dipole] {
            let mut base = Work::new(n);
            base.uv.clone_from(&uv);
            let m0 = candidate(pattern, &g_true, &mut base);
            let s0 = statistic_pass(&base.g, &num, &tr);
            let dirs: Vec<crate::sky::Direction> =
                (0..n).map(|a| [base.x[a], base.y[a], base.z[a]]).collect();
            let plain = crate::orf::pattern_for_pairs(pattern, &dirs);
            let padded = pad(&plain, n);
            for (a, b) in padded.iter().zip(&base.g) {
                assert!((a - b).abs() < 1e-14, "{pattern:?}: {a} {b}");
            }
            for isa in Isa::available() {
                let mut w2 = Work::new(n);
                w2.uv.clone_from(&uv);
                let (m, s) = match isa {
                    Isa::Baseline => (
                        candidate(pattern, &g_true, &mut w2),
                        statistic_pass(&base.g, &num, &tr),
                    ),
                    #[cfg(target_arch = "x86_64")]
                    Isa::Avx2 => unsafe {
                        (
                            candidate_avx2(pattern, &g_true, &mut w2),
                            statistic_avx2(&base.g, &num, &tr),
                        )
                    },
                    #[cfg(target_arch = "x86_64")]
                    Isa::Avx512 => unsafe {
                        (
                            candidate_avx512(pattern, &g_true, &mut w2),
                            statistic_avx512(&base.g, &num, &tr),
                        )
                    },
                };
                assert_eq!(m.0.to_bits(), m0.0.to_bits(), "{isa:?}");
                assert_eq!(m.1.to_bits(), m0.1.to_bits(), "{isa:?}");
                assert_eq!(s.0.to_bits(), s0.0.to_bits(), "{isa:?}");
                assert_eq!(s.1.to_bits(), s0.1.to_bits(), "{isa:?}");
                assert!(w2
                    .g
                    .iter()
                    .zip(&base.g)
                    .all(|(a, b)| a.to_bits() == b.to_bits()));
            }
        }
    }

    #[test]
    fn fused_pass_is_the_passes() {
        // The one-pass sums are bit for bit the separate passes' (pattern values stored, then
        // the fixed-order lane sums), for every instruction set, both patterns and row lengths
        // that are not multiples of the lane count; so a trial's numbers did not change.
        for n in [2, 9, 37] {
            let pairs = n * (n - 1) / 2;
            let mut r = crate::rng::stream(4, Purpose::Scramble, n as u64);
            let mut v = |shift: f64| -> Vec<f64> {
                pad(
                    &(0..pairs)
                        .map(|_| r.random::<f64>() - shift)
                        .collect::<Vec<_>>(),
                    n,
                )
            };
            let t = Tables {
                g_true: v(0.3),
                numerators: v(0.5),
                traces: v(0.0),
                valid: pad(&vec![1.0; pairs], n),
            };
            let uv: Vec<f64> = (0..2 * n).map(|_| r.random()).collect();
            for pattern in [Pattern::Hd, Pattern::Dipole] {
                let mut w = Work::new(n);
                w.uv.clone_from(&uv);
                let (cross, g2) = candidate(pattern, &t.g_true, &mut w);
                let (num, den) = statistic_pass(&w.g, &t.numerators, &t.traces);
                let want = [cross, g2, num, den].map(f64::to_bits);
                for isa in Isa::available() {
                    let mut w2 = Work::new(n);
                    w2.uv.clone_from(&uv);
                    let got = match isa {
                        Isa::Baseline => candidate_fused(pattern, &t, &mut w2),
                        #[cfg(target_arch = "x86_64")]
                        Isa::Avx2 => unsafe { fused_avx2(pattern, &t, &mut w2) },
                        #[cfg(target_arch = "x86_64")]
                        Isa::Avx512 => unsafe { fused_avx512(pattern, &t, &mut w2) },
                    };
                    assert_eq!(got.map(f64::to_bits), want, "{n} {pattern:?} {isa:?}");
                }
            }
        }
    }

    #[test]
    fn padded_rows_hold_every_pair_once() {
        for n in [2, 3, 8, 9, 17, 100] {
            let pairs = n * (n - 1) / 2;
            let v: Vec<f64> = (0..pairs).map(|i| i as f64 + 1.0).collect();
            let p = pad(&v, n);
            assert_eq!(p.len() % LANES, 0);
            assert_eq!(p.iter().filter(|x| **x != 0.0).count(), pairs);
            assert_eq!(p.iter().sum::<f64>(), v.iter().sum::<f64>());
        }
    }

    #[test]
    fn fast_hellings_downs_matches_the_closed_form_and_published_values() {
        for i in 0..=2000 {
            let c = -1.0 + i as f64 / 1000.0;
            assert!((hd_fast(c) - hellings_downs(c)).abs() < 1e-15, "{c}");
        }
        // Closed-form values (docs/optimal-statistic.md): 0.5 at 0 deg, 0.25 at 180 deg,
        // minimum 1/2 - (3/2) e^(-5/6) = -0.15190 at 82.48 deg.
        assert_eq!(hd_fast(1.0), 0.5);
        assert!((hd_fast(-1.0) - 0.25).abs() < 1e-15);
        assert!((hd_fast(82.48f64.to_radians().cos()) + 0.15190).abs() < 1e-5);
    }
}
