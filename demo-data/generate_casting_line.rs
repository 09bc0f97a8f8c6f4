//! Generates the second invented demo data set: one die-casting line of the
//! made-up foundry over four months, with the die that cast each housing and
//! the time it was cast. Everything here is invented for the demo; no real
//! plant, product or person is described.
//!
//! Normal housings are written as Parquet files, one per month, in the layout
//! distributed engines use (`part-NNNNN.parquet` plus a `_SUCCESS` marker);
//! housings that later failed the leak test are a separate CSV. A few vacuum
//! readings are missing (sensor drop-outs). Failures come from four worn dies.
//!
//! Run: `cargo run --example generate-casting-line -- demo-data/casting-line`

use std::io::Write;
use std::path::Path;

use polars::prelude::*;
use rand_chacha::rand_core::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;

const SEED: u64 = 20_260_701;
const PER_MONTH: usize = 2_000;
const DIES: u32 = 12;

struct Gen(ChaCha20Rng);

impl Gen {
    fn uniform(&mut self) -> f64 {
        ((self.0.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        libm::sqrt(-2.0 * libm::log(u)) * libm::cos(2.0 * std::f64::consts::PI * v)
    }
    fn below(&mut self, n: u32) -> u32 {
        (self.0.next_u64() % u64::from(n)) as u32
    }
}

struct Housing {
    id: String,
    die: u32,
    time: String,
    pressure: f64,
    temp: f64,
    fill: f64,
    cooling: f64,
    vacuum: Option<f64>,
    wall: f64,
}

/// Each die runs a little hotter or cooler and casts slightly thicker or
/// thinner walls; the line drifts warmer over the months. Failures come from
/// four worn dies (D03, D05, D07, D11), as porosity from die wear would.
fn housing(g: &mut Gen, id: usize, month: u32, fault: Option<u32>) -> Housing {
    let die = match fault {
        None => g.below(DIES),
        Some(_) => [2, 4, 6, 10][g.below(4) as usize],
    };
    let die_temp_bias = (f64::from(die) - 5.5) * 0.6;
    let die_wall_bias = (f64::from(die % 4) - 1.5) * 0.02;
    let z: [f64; 6] = std::array::from_fn(|_| g.normal());
    let (mut temp, mut fill, mut cool, mut press, mut wall, mut vac_log) = (
        z[0],
        -0.8 * z[0] + 0.6 * z[1],
        0.6 * z[0] + 0.8 * z[2],
        z[3],
        0.7 * z[3] + 0.714_142_842_854_285 * z[4],
        0.25 * z[5],
    );
    match fault {
        Some(0) => {
            vac_log += 0.9 + 0.3 * g.uniform();
            press -= 1.0;
        }
        Some(1) => {
            temp += 1.6;
            fill += 2.0;
        }
        Some(2) => {
            cool -= 2.4;
            wall -= 2.2;
        }
        Some(_) => {
            temp += 1.2;
            cool -= 1.2;
        }
        None => {}
    }
    let day = 1 + g.below(28);
    let minute = g.below(24 * 60);
    let vacuum = libm::exp(libm::log(50.0) + vac_log);
    Housing {
        id: format!("CL-{id:05}"),
        die: die + 1,
        time: format!(
            "2026-{:02}-{:02}T{:02}:{:02}:00Z",
            7 + month,
            day,
            minute / 60,
            minute % 60
        ),
        pressure: 82.0 + 3.5 * press,
        temp: 212.0 + f64::from(month) * 1.5 + die_temp_bias + 7.0 * temp,
        fill: 48.0 + 3.0 * fill,
        cooling: 14.5 + 0.9 * cool,
        // About 3 in 1,000 vacuum readings drop out.
        vacuum: (g.below(1000) >= 3).then_some(vacuum),
        wall: 4.0 + die_wall_bias + 0.07 * wall,
    }
}

fn round(v: f64, dp: i32) -> f64 {
    let s = 10f64.powi(dp);
    (v * s).round() / s
}

fn frame(rows: &[Housing]) -> PolarsResult<DataFrame> {
    DataFrame::new(
        rows.len(),
        vec![
            Column::new(
                "housing_id".into(),
                rows.iter().map(|h| h.id.clone()).collect::<Vec<_>>(),
            ),
            Column::new(
                "die_id".into(),
                rows.iter()
                    .map(|h| format!("D{:02}", h.die))
                    .collect::<Vec<_>>(),
            ),
            Column::new(
                "cast_time".into(),
                rows.iter().map(|h| h.time.clone()).collect::<Vec<_>>(),
            ),
            Column::new(
                "shot_pressure_mpa".into(),
                rows.iter()
                    .map(|h| round(h.pressure, 2))
                    .collect::<Vec<_>>(),
            ),
            Column::new(
                "die_temp_c".into(),
                rows.iter().map(|h| round(h.temp, 1)).collect::<Vec<_>>(),
            ),
            Column::new(
                "fill_time_ms".into(),
                rows.iter().map(|h| round(h.fill, 2)).collect::<Vec<_>>(),
            ),
            Column::new(
                "cooling_time_s".into(),
                rows.iter().map(|h| round(h.cooling, 2)).collect::<Vec<_>>(),
            ),
            Column::new(
                "vacuum_mbar".into(),
                rows.iter()
                    .map(|h| h.vacuum.map(|v| round(v, 1)))
                    .collect::<Vec<_>>(),
            ),
            Column::new(
                "wall_thickness_mm".into(),
                rows.iter().map(|h| round(h.wall, 3)).collect::<Vec<_>>(),
            ),
        ],
    )
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let root = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "demo-data/casting-line".into());
    let root = Path::new(&root);
    let normal_dir = root.join("normal");
    std::fs::create_dir_all(&normal_dir)?;
    let mut g = Gen(ChaCha20Rng::seed_from_u64(SEED));
    let mut id = 1;
    for month in 0..4u32 {
        let mut rows: Vec<Housing> = (0..PER_MONTH)
            .map(|_| {
                id += 1;
                housing(&mut g, id, month, None)
            })
            .collect();
        rows.sort_by(|a, b| a.time.cmp(&b.time));
        let mut df = frame(&rows)?;
        let f = std::fs::File::create(normal_dir.join(format!("part-{month:05}.parquet")))?;
        ParquetWriter::new(f).finish(&mut df)?;
    }
    std::fs::write(normal_dir.join("_SUCCESS"), "")?;
    // 32 failures over the four months: 10 gas porosity, 8 flow, 8 shrinkage, 6 subtle.
    let modes = [(0u32, 10), (1, 8), (2, 8), (3, 6)];
    let mut failures = Vec::new();
    for (mode, k) in modes {
        for _ in 0..k {
            id += 1;
            let month = g.below(4);
            let mut h = housing(&mut g, id, month, Some(mode));
            h.vacuum.get_or_insert(50.0);
            failures.push(h);
        }
    }
    failures.sort_by(|a, b| a.time.cmp(&b.time));
    let mut out = std::io::BufWriter::new(std::fs::File::create(root.join("failures.csv"))?);
    writeln!(out, "housing_id,die_id,cast_time,shot_pressure_mpa,die_temp_c,fill_time_ms,cooling_time_s,vacuum_mbar,wall_thickness_mm")?;
    for h in &failures {
        writeln!(
            out,
            "{},D{:02},{},{:.2},{:.1},{:.2},{:.2},{:.1},{:.3}",
            h.id,
            h.die,
            h.time,
            h.pressure,
            h.temp,
            h.fill,
            h.cooling,
            h.vacuum.unwrap_or(50.0),
            h.wall
        )?;
    }
    out.flush()?;
    Ok(())
}
