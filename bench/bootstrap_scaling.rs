//! The bootstrap's cost against the rows, with the anomalies fixed: scores
//! of N normal rows and A anomalies (synthetic: normal rows N(0, 1),
//! anomalies N(2.5, 1), so they mix with the normal rows' upper tail),
//! summarised once, then 1,000 replicates drawn from the summary at the
//! max-F1 τ. Prints one Markdown row per N: the summary pass and the
//! bootstrap, each the median wall time of 5 runs.
//!
//!   cargo run --release --example bootstrap-scaling [-- A N...]
//!
//! Defaults: A = 50, N = 100,000, 1,000,000 and 5,000,000.

use anomark::metrics::bootstrap_summary;
use anomark::spec::BootstrapPlan;
use anomark::summary::Summary;
use std::time::Instant;

/// A standard normal draw (Box-Muller on two uniforms).
fn normal(rng: &mut rand_chacha::ChaCha8Rng) -> f64 {
    let u = 1.0 - anomark::rng::unit(rng);
    let v = anomark::rng::unit(rng);
    (-2.0 * libm::log(u)).sqrt() * libm::cos(std::f64::consts::TAU * v)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.replace(['_', ','], "").parse().expect("whole numbers"))
        .collect();
    let anomalies = args.first().copied().unwrap_or(50);
    let sizes = if args.len() > 1 {
        args[1..].to_vec()
    } else {
        vec![100_000, 1_000_000, 5_000_000]
    };
    let plan = BootstrapPlan {
        replicates: 1000,
        seed: 1,
    };
    println!("| normal rows | anomalies | summary pass s | 1,000 replicates s |");
    println!("|---:|---:|---:|---:|");
    for n in sizes {
        let mut rng = anomark::rng::seeded(7, n as u64);
        let scores: Vec<f64> = (0..n + anomalies)
            .map(|i| normal(&mut rng) + if i < anomalies { 2.5 } else { 0.0 })
            .collect();
        let y: Vec<bool> = (0..n + anomalies).map(|i| i < anomalies).collect();
        let tau = anomark::threshold::max_f1(&scores, &y).tau;
        let (mut pass, mut boot) = (vec![], vec![]);
        for _ in 0..5 {
            let t = Instant::now();
            let s = Summary::new(&scores, &y, &[tau]);
            pass.push(t.elapsed().as_secs_f64());
            let t = Instant::now();
            let r = bootstrap_summary(&s, tau, plan, 0.95);
            boot.push(t.elapsed().as_secs_f64());
            assert!(r.is_some());
        }
        println!(
            "| {n} | {anomalies} | {:.4} | {:.4} |",
            median(pass),
            median(boot)
        );
    }
}
