//! The memory estimate against the heap a fit really uses: a counting allocator records
//! the peak bytes live while `sample` runs, and the estimate must cover it without being
//! far above it. This file is its own test binary, so the allocator counts nothing else.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

use tidemark_model::simulate::{
    censor_share, observer_data, simulate, NetworkSpec, ObserverAssignment, ObserverSpec,
};
use tidemark_model::{memory_estimate, sample, Censoring, Controls, Priors, SamplerSettings};

struct Counting;

static LIVE: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        let p = unsafe { System.alloc(layout) };
        if !p.is_null() {
            let now = LIVE.fetch_add(layout.size(), Ordering::SeqCst) + layout.size();
            PEAK.fetch_max(now, Ordering::SeqCst);
        }
        p
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe { System.dealloc(ptr, layout) };
        LIVE.fetch_sub(layout.size(), Ordering::SeqCst);
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

/// Peak heap bytes of one fit, measured from a fresh peak.
fn measured_peak(data: &tidemark_model::Data, s: &SamplerSettings) -> u64 {
    let before = LIVE.load(Ordering::SeqCst);
    PEAK.store(before, Ordering::SeqCst);
    let post = sample(data, &Priors::default(), s, None, Controls::default()).unwrap();
    let peak = PEAK.load(Ordering::SeqCst).saturating_sub(before) as u64;
    drop(post);
    peak
}

/// Shapes where different terms dominate: saved draws with one worker, several workers
/// summarising at once, more chains than workers, many sites and years (the effect draws
/// and the dense statistics), and an observer factor with many levels (the sparse
/// statistics and factors, and the factorisation's per-thread buffers; observers in moving
/// blocks and at random). The cases
/// run in one test, one at a time (one allocator).
#[test]
fn the_estimate_covers_the_measured_peak_and_is_not_far_above_it() {
    let cases = [
        (12usize, 4usize, 2usize, 40_000usize, 1usize, None, 0.0),
        (12, 4, 4, 20_000, 4, None, 0.0),
        (12, 4, 6, 10_000, 2, None, 0.0),
        (300, 12, 2, 2_000, 2, None, 0.0),
        // Half the values censored: every chain's own copy of the moving statistics.
        (4000, 20, 4, 100, 2, None, 0.5),
        (
            2000,
            10,
            2,
            300,
            2,
            Some((1500, ObserverAssignment::Blocks)),
            0.0,
        ),
    ];
    for (sites, years, chains, draws, threads, observers, censored) in cases {
        let spec = NetworkSpec {
            sites,
            years,
            seed: 11,
            ..Default::default()
        };
        let data = match observers {
            None => simulate(&spec).0,
            Some((levels, assignment)) => {
                let o = ObserverSpec {
                    levels,
                    period_years: 2,
                    sd: 0.3,
                    assignment,
                };
                observer_data(&spec, &o).unwrap()
            }
        };
        let data = if censored > 0.0 {
            censor_share(&data, Censoring::Below, censored).0
        } else {
            data
        };
        let s = SamplerSettings {
            chains,
            draws,
            warmup: 300,
            threads,
            ..SamplerSettings::default()
        };
        let peak = measured_peak(&data, &s);
        let estimate = memory_estimate(&data, &s);
        let case = format!(
            "{sites} sites x {years} years, observers {observers:?}, censored {censored}, {chains} chains x {draws} draws, {threads} threads"
        );
        assert!(
            estimate >= peak,
            "{case}: estimate {estimate} B below the measured peak {peak} B"
        );
        assert!(
            estimate <= 2 * peak,
            "{case}: estimate {estimate} B more than twice the measured peak {peak} B"
        );
    }
}
