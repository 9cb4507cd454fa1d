//! Progress bars for long work. indicatif hides them when standard error is
//! not a terminal, so CI logs stay clean.

use indicatif::{ProgressBar, ProgressStyle};

pub fn bar(len: u64, what: &str) -> ProgressBar {
    let pb = ProgressBar::new(len);
    pb.set_style(
        ProgressStyle::with_template("{msg:>12} [{bar:30}] {pos}/{len} ({elapsed})")
            .expect("valid template")
            .progress_chars("=> "),
    );
    pb.set_message(what.to_string());
    pb
}
