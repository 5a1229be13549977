//! A progress bar on standard error, hidden when standard error is not a
//! terminal or with `--quiet`.

use std::io::IsTerminal;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// The probe's progress, drawn with indicatif.
pub(super) struct Bar {
    bar: ProgressBar,
}

impl Bar {
    pub(super) fn new(quiet: bool) -> Bar {
        let bar = ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr());
        if quiet || !std::io::stderr().is_terminal() {
            bar.set_draw_target(ProgressDrawTarget::hidden());
        }
        bar.set_style(
            ProgressStyle::with_template("{msg:>22} [{bar:30}] {pos}/{len} {elapsed}")
                .expect("valid template")
                .progress_chars("=> "),
        );
        Bar { bar }
    }

    pub(super) fn clear(&self) {
        self.bar.finish_and_clear();
    }
}

impl crate::probe::Progress for Bar {
    fn step(&self, message: &str, total: u64) {
        self.bar.set_message(message.to_owned());
        self.bar.set_length(total);
        self.bar.set_position(0);
    }

    fn advance(&self) {
        self.bar.inc(1);
    }

    fn finish(&self) {
        self.bar.finish_and_clear();
    }
}
