//! Quick timing harness for `stats::monitoring` (no criterion): runs each
//! operation repeatedly and prints the median and spread of the wall time.
//! Run with `cargo bench --bench monitoring`.

use lotdrift::stats::Alternative;
use lotdrift::stats::Summary;
use lotdrift::stats::monitoring::{
    cusum_arl, cusum_arl_two_sided, cusum_h_for_arl, cusum_h_for_rate_estimated, lot_vs_baseline,
    min_detectable_shift, random_effects,
};
use std::hint::black_box;
use std::time::{Duration, Instant};

fn time<T>(name: &str, reps: usize, inner: usize, mut f: impl FnMut() -> T) {
    let mut samples: Vec<Duration> = (0..reps)
        .map(|_| {
            let t = Instant::now();
            for _ in 0..inner {
                black_box(f());
            }
            t.elapsed() / inner as u32
        })
        .collect();
    samples.sort();
    println!(
        "{name:<58} median {:>12.3?}  min {:>12.3?}  max {:>12.3?}  ({reps} samples x {inner})",
        samples[reps / 2],
        samples[0],
        samples[reps - 1]
    );
}

fn main() {
    // Deterministic baseline: 20 lots of 30 units with between-lot variation.
    let lots: Vec<Summary> = (0..20)
        .map(|i| {
            let offset = 0.3 * ((i * 7 % 11) as f64 - 5.0) / 5.0;
            let xs: Vec<f64> = (0..30)
                .map(|j| 10.0 + offset + ((i * 31 + j * 17) % 23) as f64 / 23.0 - 0.5)
                .collect();
            Summary::from_slice(&xs).unwrap()
        })
        .collect();
    let re = random_effects(&lots).unwrap();
    let lot = lots[3];
    time("random_effects (20 lots)", 51, 10_000, || {
        random_effects(&lots)
    });
    time("lot_vs_baseline (two-sided)", 51, 10_000, || {
        lot_vs_baseline(&re, &lot, Alternative::TwoSided, 0.0, 0.95)
    });
    time("lot_vs_baseline (greater, delta 0.1)", 51, 10_000, || {
        lot_vs_baseline(&re, &lot, Alternative::Greater, 0.1, 0.95)
    });
    time("cusum_arl (k 0.5, h 5)", 51, 200, || {
        cusum_arl(0.5, 5.0, 0.0, 1.0)
    });
    time(
        "cusum_h_for_arl (k 0.5, ARL0 500, two-sided)",
        21,
        5,
        || cusum_h_for_arl(0.5, 500.0, true),
    );
    time(
        "cusum_h_for_rate_estimated (k 0.5, 1/500, m 20, df 19, 2-sided)",
        11,
        1,
        || cusum_h_for_rate_estimated(0.5, 1.0 / 500.0, 20.0, 19.0, true),
    );
    time(
        "cusum_h_for_rate_estimated (k 0.5, 1/500, m 50, df 49, 1-sided)",
        11,
        1,
        || cusum_h_for_rate_estimated(0.5, 1.0 / 500.0, 50.0, 49.0, false),
    );
    time(
        "cusum_h_for_rate_estimated (k 0.5, 1/500, m 5, df 4, 2-sided)",
        11,
        1,
        || cusum_h_for_rate_estimated(0.5, 1.0 / 500.0, 5.0, 4.0, true),
    );
    // Design table: h for one false alert per 500 lots, two-sided, k = 0.5.
    println!("\ndesign: k = 0.5, two-sided, expected false-alarm rate 1/500");
    println!("  m     h      ARL(δ=1, true params)  ARL0 if params were known");
    for m in [5.0, 10.0, 20.0, 50.0, 100.0, f64::INFINITY] {
        let h = cusum_h_for_rate_estimated(0.5, 1.0 / 500.0, m, m - 1.0, true).unwrap();
        let arl1 = cusum_arl_two_sided(0.5, h, 1.0, 1.0).unwrap();
        let arl0 = cusum_arl_two_sided(0.5, h, 0.0, 1.0)
            .map_or_else(|_| "beyond 1e12".to_string(), |a| format!("{a:.0}"));
        println!("  {m:<5} {h:<6.3} {arl1:<22.2} {arl0}");
    }
    println!();
    time("min_detectable_shift (0.01, 0.9, df 19)", 21, 100, || {
        min_detectable_shift(0.01, 0.9, 1.0, 19.0, true)
    });
}
