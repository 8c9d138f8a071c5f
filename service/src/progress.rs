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
        let style = ProgressStyle::with_template("{prefix:>28} [{bar:30}] {pos}/{len} {elapsed}")
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
        let bars = (0..chains)
            .map(|c| {
                let bar = self.multi.add(ProgressBar::new(0));
                bar.set_style(style.clone());
                bar.set_prefix(format!("{series} {attempt} chain {}", c + 1));
                bar
            })
            .collect();
        ChainBars { bars }
    }
}

/// The bars of one attempt; cleared when dropped.
pub struct ChainBars {
    bars: Vec<ProgressBar>,
}

impl ChainBars {
    pub fn update(&self, p: tidemark_model::Progress) {
        if let Some(bar) = self.bars.get(p.chain) {
            bar.set_length(p.total as u64);
            bar.set_position(p.iteration as u64);
        }
    }
}

impl Drop for ChainBars {
    fn drop(&mut self) {
        for bar in &self.bars {
            bar.finish_and_clear();
        }
    }
}
