//! Progress on stderr: a bar on a terminal, plain periodic lines otherwise.

use std::io::IsTerminal;
use std::time::{Duration, Instant};

pub struct ProgressReporter {
    bar: Option<indicatif::ProgressBar>,
    plain: bool,
    total: u64,
    label: &'static str,
    started: Instant,
    last_line: Instant,
}

const PLAIN_EVERY: Duration = Duration::from_secs(10);

impl ProgressReporter {
    pub fn new(total: u64, quiet: bool, label: &'static str) -> Self {
        let terminal = std::io::stderr().is_terminal();
        let bar = (!quiet && terminal).then(|| {
            let bar = indicatif::ProgressBar::new(total);
            bar.set_style(
                indicatif::ProgressStyle::with_template(
                    "{prefix} [{bar:40}] {pos}/{len} features, {per_sec}, eta {eta}",
                )
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
                .progress_chars("=> "),
            );
            bar.set_prefix(label);
            bar
        });
        ProgressReporter {
            bar,
            plain: !quiet && !terminal,
            total,
            label,
            started: Instant::now(),
            last_line: Instant::now(),
        }
    }

    pub fn update(&mut self, done: u64) {
        if let Some(bar) = &self.bar {
            bar.set_position(done);
        } else if self.plain && self.last_line.elapsed() >= PLAIN_EVERY {
            self.last_line = Instant::now();
            let secs = self.started.elapsed().as_secs_f64();
            eprintln!(
                "{}: {done} of {} features ({:.0}%), {:.0} features/s",
                self.label,
                self.total,
                100.0 * done as f64 / self.total.max(1) as f64,
                done as f64 / secs.max(1e-9)
            );
        }
    }

    pub fn finish(&mut self) {
        if let Some(bar) = self.bar.take() {
            bar.finish_and_clear();
        }
    }
}
