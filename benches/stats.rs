//! Benchmarks of the statistics core (no criterion; harness = false).
//!
//! Run: `cargo bench --bench stats`. Prints the median over REPS repetitions.

use lotdrift::stats::{
    Alternative, Summary, TTestOptions, mann_whitney, shapiro_wilk, welch, welch_p,
};
use std::hint::black_box;
use std::time::Instant;

const REPS: usize = 15;

/// Small deterministic generator (xorshift64*), uniform in [0, 1).
struct Rng(u64);

impl Rng {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Standard normal by Box–Muller.
    fn normal(&mut self) -> f64 {
        let u = self.uniform().max(1e-300);
        let v = self.uniform();
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    }
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let mut rng = Rng(0x9E37_79B9_7F4A_7C15);

    // Stored per-lot summaries: lots of 5..60 values with varied means/sds.
    let summaries: Vec<Summary> = (0..1024)
        .map(|_| {
            let n = 5 + (rng.uniform() * 55.0) as usize;
            let mu = 10.0 + rng.normal();
            let sd = 0.5 + rng.uniform();
            let xs: Vec<f64> = (0..n).map(|_| mu + sd * rng.normal()).collect();
            Summary::from_slice(&xs).expect("summary")
        })
        .collect();
    let opts = TTestOptions::default();
    let per_rep = 200_000usize;
    // Median tests per second of `test` over pairs of stored summaries.
    let rate = |test: &dyn Fn(&Summary, &Summary) -> f64| {
        let mut rates = Vec::with_capacity(REPS);
        for _ in 0..REPS {
            let start = Instant::now();
            let mut acc = 0.0;
            for i in 0..per_rep {
                acc += test(&summaries[i & 1023], &summaries[(i * 7 + 3) & 1023]);
            }
            black_box(acc);
            rates.push(per_rep as f64 / start.elapsed().as_secs_f64());
        }
        median(rates)
    };
    let with_ci = rate(&|a, b| {
        let r = welch(black_box(a), black_box(b), black_box(&opts)).expect("welch");
        r.p_value + r.ci.0
    });
    println!(
        "welch from summaries (with p and 95% CI): median {:.2} million tests/s per core",
        with_ci / 1e6
    );
    // The decision alone (statistic, df, p): what a screening pass over many pairs needs.
    let decision = rate(&|a, b| {
        welch_p(black_box(a), black_box(b), 0.0, Alternative::TwoSided)
            .expect("welch_p")
            .p_value
    });
    println!(
        "welch from summaries (statistic, df, p; welch_p): median {:.2} million tests/s per core (target >= 2)",
        decision / 1e6
    );

    let a: Vec<f64> = (0..1000).map(|_| rng.normal()).collect();
    let b: Vec<f64> = (0..1000).map(|_| 0.1 + rng.normal()).collect();
    let inner = 100;
    let mut times = Vec::with_capacity(REPS);
    for _ in 0..REPS {
        let start = Instant::now();
        for _ in 0..inner {
            let r = mann_whitney(black_box(&a), black_box(&b), Alternative::TwoSided)
                .expect("mann-whitney");
            black_box(r.p_value);
        }
        times.push(start.elapsed().as_secs_f64() / inner as f64 * 1e6);
    }
    println!(
        "mann-whitney 2 x 1000 values: median {:.1} us (target <= 100)",
        median(times)
    );

    let x: Vec<f64> = (0..1000).map(|_| 50.0 + 5.0 * rng.normal()).collect();
    let mut times = Vec::with_capacity(REPS);
    for _ in 0..REPS {
        let start = Instant::now();
        for _ in 0..inner {
            let r = shapiro_wilk(black_box(&x)).expect("shapiro-wilk");
            black_box(r.p_value);
        }
        times.push(start.elapsed().as_secs_f64() / inner as f64 * 1e6);
    }
    println!("shapiro-wilk 1000 values: median {:.1} us", median(times));
}
