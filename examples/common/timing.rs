//! Wall-clock sampling shared by the timing examples (each includes this file with `#[path]`): one closure run
//! `reps` times, the samples sorted, so a median and a minimum are one index away. On a shared machine the
//! minimum is the run that was not preempted; the median is what the benches quote.
#![allow(dead_code)] // each example uses the readings it prints

use std::time::Instant;

/// The wall times of `reps` runs of `f`, in seconds, sorted ascending.
pub fn sorted_seconds(reps: usize, mut f: impl FnMut()) -> Vec<f64> {
    let mut v: Vec<f64> = (0..reps.max(1))
        .map(|_| {
            let t = Instant::now();
            f();
            t.elapsed().as_secs_f64()
        })
        .collect();
    v.sort_by(f64::total_cmp);
    v
}

/// The median of `reps` runs of `f`, in microseconds.
pub fn median_us(reps: usize, f: impl FnMut()) -> f64 {
    let v = sorted_seconds(reps, f);
    v[v.len() / 2] * 1e6
}

/// The median of `reps` runs of `f`, in milliseconds.
pub fn median_ms(reps: usize, f: impl FnMut()) -> f64 {
    median_us(reps, f) / 1e3
}

/// "median (minimum)" of `reps` runs of `f`, in milliseconds.
pub fn median_min_ms(reps: usize, f: impl FnMut()) -> String {
    let v = sorted_seconds(reps, f);
    format!("{:.3} ({:.3})", v[v.len() / 2] * 1e3, v[0] * 1e3)
}
