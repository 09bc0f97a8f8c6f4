//! Generates the invented demo data: die-cast aluminium pump housings from a
//! made-up foundry, with process readings and the result of a later pressure
//! leak test. Everything here is invented for the demo; no real plant, product
//! or person is described.
//!
//! Run: `cargo run --example generate-demo -- demo-data/pump-housings.csv`
//! The output depends on the seed alone (ChaCha20, Box–Muller with `libm`,
//! fixed decimal places), so the committed CSV can be regenerated bit for bit.

use std::io::Write;

use rand_chacha::rand_core::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;

const SEED: u64 = 20_261_201;
const PASSING: usize = 10_000;

/// Feature name, mean, standard deviation, decimals.
const FEATURES: [(&str, f64, f64, usize); 6] = [
    ("shot_pressure_mpa", 82.0, 3.5, 2),
    ("die_temp_c", 215.0, 7.0, 1),
    ("fill_time_ms", 48.0, 3.0, 2),
    ("cooling_time_s", 14.5, 0.9, 2),
    ("vacuum_mbar", 55.0, 9.0, 1),
    ("wall_thickness_mm", 4.0, 0.07, 3),
];

struct Normal(ChaCha20Rng);

impl Normal {
    fn uniform(&mut self) -> f64 {
        // 53 random bits in (0, 1): never 0, so the logarithm below is finite.
        ((self.0.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn next(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        libm::sqrt(-2.0 * libm::log(u)) * libm::cos(2.0 * std::f64::consts::PI * v)
    }
    fn between(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.uniform()
    }
}

/// One housing's readings in standard units, with the process correlations:
/// a hotter die fills faster and needs longer cooling; a higher shot pressure
/// packs thicker walls; vacuum leaks a little with long fills.
fn passing(n: &mut Normal) -> [f64; 6] {
    let z: [f64; 6] = std::array::from_fn(|_| n.next());
    let die = z[0];
    let fill = -0.8 * z[0] + 0.6 * z[1];
    let cool = 0.6 * z[0] + 0.8 * z[2];
    let press = z[3];
    let wall = 0.7 * z[3] + 0.714_142_842_854_285 * z[4];
    let vac = 0.3 * z[1] + 0.953_939_201_416_945_6 * z[5];
    [press, die, fill, cool, vac, wall]
}

/// A housing that later failed the leak test: a passing draw plus a shift
/// typical of one failure mode.
fn failing(n: &mut Normal, mode: usize) -> [f64; 6] {
    let mut x = passing(n);
    match mode {
        // Gas porosity: poor vacuum with a somewhat low shot pressure.
        0 => {
            x[4] += n.between(3.5, 4.5);
            x[0] -= n.between(0.8, 1.6);
        }
        // Flow defect: a hot die and yet a long fill, against the usual relation.
        1 => {
            x[1] += n.between(1.5, 2.0);
            x[2] += n.between(1.8, 2.4);
        }
        // Shrinkage porosity: a hot die cooled too briefly, and thin walls.
        2 => {
            x[1] += n.between(0.8, 1.4);
            x[3] -= n.between(2.0, 2.8);
            x[5] -= n.between(2.0, 2.6);
        }
        // Subtle: small shifts in two readings, easy to miss.
        _ => {
            let a = (n.0.next_u32() % 6) as usize;
            let b = (a + 1 + (n.0.next_u32() % 5) as usize) % 6;
            let sign = |n: &mut Normal| {
                if n.0.next_u32().is_multiple_of(2) {
                    1.0
                } else {
                    -1.0
                }
            };
            let (sa, sb) = (sign(n), sign(n));
            x[a] += sa * n.between(1.0, 1.6);
            x[b] += sb * n.between(1.0, 1.6);
        }
    }
    x
}

fn main() -> std::io::Result<()> {
    let path = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "demo-data/pump-housings.csv".into());
    let mut n = Normal(ChaCha20Rng::seed_from_u64(SEED));
    // 8 gas porosity, 6 flow defects, 5 shrinkage, 5 subtle: 24 failures.
    let modes: Vec<usize> = [(0, 8), (1, 6), (2, 5), (3, 5)]
        .iter()
        .flat_map(|&(m, k)| std::iter::repeat_n(m, k))
        .collect();
    let mut rows: Vec<([f64; 6], bool)> = (0..PASSING).map(|_| (passing(&mut n), false)).collect();
    for &m in &modes {
        let at = (n.0.next_u64() % (rows.len() as u64 + 1)) as usize;
        rows.insert(at, (failing(&mut n, m), true));
    }

    let mut out = std::io::BufWriter::new(std::fs::File::create(&path)?);
    write!(out, "housing_id")?;
    for (name, ..) in FEATURES {
        write!(out, ",{name}")?;
    }
    writeln!(out, ",leak_test")?;
    for (i, (x, failed)) in rows.iter().enumerate() {
        write!(out, "PH-{:05}", i + 1)?;
        for ((_, mean, sd, dp), z) in FEATURES.iter().zip(x) {
            write!(out, ",{:.*}", *dp, mean + sd * z)?;
        }
        writeln!(out, ",{}", if *failed { "fail" } else { "pass" })?;
    }
    out.flush()
}
