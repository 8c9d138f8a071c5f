//! Progress bars for long fits, one per chain, on stderr when it is a terminal
//! (indicatif). `refit` and `run-once` ask for them; `serve`, logs and pipes never get
//! them. The sampler reports through `tidemark_model::Controls::progress`.

use std::fmt;
use std::io::IsTerminal;

use indicatif::{MultiProgress, ProgressBar, ProgressStyle};

/// Where fit progress is drawn. Cheap to clone.
#[derive(Clone)]
pub struct FitProgress {
    multi: MultiProgress,
}

impl fmt::Debug for FitProgress {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("FitProgress")
    }
}

impl FitProgress {
    /// Bars when stderr is a terminal; `None` otherwise.
    pub fn on_terminal() -> Option<FitProgress> {
        std::io::stderr().is_terminal().then(|| FitProgress {
            multi: MultiProgress::new(),
        })
    }

    /// One bar per chain for one attempt of one series.
    pub fn chains(&self, series: &str, attempt: &str, chains: usize) -> ChainBars {
        ChainBars::new(
            (0..chains).map(|_| self.multi.add(ProgressBar::no_length())),
            series,
            attempt,
        )
    }
}

/// The bars of one attempt; cleared when dropped. A chain that has not started yet
/// (the pool runs as many chains at once as it has threads) says so instead of showing
/// an empty `0/0` bar that looks finished.
pub struct ChainBars {
    bars: Vec<ProgressBar>,
    running: ProgressStyle,
}

impl ChainBars {
    fn new(bars: impl Iterator<Item = ProgressBar>, series: &str, attempt: &str) -> ChainBars {
        let waiting = ProgressStyle::with_template("{prefix:>28} waiting for a free core")
            .unwrap_or_else(|_| ProgressStyle::default_spinner());
        let running = ProgressStyle::with_template("{prefix:>28} [{bar:30}] {pos}/{len} {elapsed}")
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
        let bars = bars
            .enumerate()
            .map(|(c, bar)| {
                bar.set_style(waiting.clone());
                bar.set_prefix(format!("{series} {attempt} chain {}", c + 1));
                bar
            })
            .collect();
        ChainBars { bars, running }
    }

    pub fn update(&self, p: tidemark_model::Progress) {
        if let Some(bar) = self.bars.get(p.chain) {
            if bar.length().is_none() {
                bar.set_style(self.running.clone());
            }
            bar.set_length(p.total as u64);
            bar.set_position(p.iteration as u64);
        }
    }

    /// Chains that have reported progress.
    pub fn started(&self) -> usize {
        self.bars.iter().filter(|b| b.length().is_some()).count()
    }
}

impl Drop for ChainBars {
    fn drop(&mut self) {
        for bar in &self.bars {
            bar.finish_and_clear();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_chain_is_waiting_until_it_reports() {
        let bars = ChainBars::new(
            (0..4).map(|_| {
                ProgressBar::with_draw_target(None, indicatif::ProgressDrawTarget::hidden())
            }),
            "chlorophyll",
            "warm",
        );
        assert_eq!(bars.started(), 0);
        bars.update(tidemark_model::Progress {
            chain: 2,
            iteration: 10,
            total: 2000,
        });
        assert_eq!(bars.started(), 1);
        assert_eq!(bars.bars[2].length(), Some(2000));
        assert_eq!(bars.bars[0].length(), None, "chain 1 still waiting");
    }
}
