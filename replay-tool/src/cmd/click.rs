//! The click decoder's shared offline steps: a block's click cues (or the
//! error that says what to provide) and its cross-validated scores with
//! the daemon's default gate, for `train --click` and `evaluate --click`.

use anyhow::{Context, Result};

/// A block's click cues, or the error that says what to provide.
pub fn click_cues<'a>(
    block: &'a decoder_core::Block,
    source: &std::path::Path,
) -> Result<&'a [bool]> {
    match &block.click {
        Some(c) => Ok(c),
        None => anyhow::bail!(
            "{}: no click cues; --click needs click.npy in the session directory (one bool a bin, true where the task cued a click), as simulate --click writes",
            source.display()
        ),
    }
}

/// Cross-validated click scores of a click decoder with `lags` and
/// `shrinkage` on `block`'s valid rows, clicks decided by the daemon's
/// default gate (`[click]` defaults); used by `evaluate --click` and by
/// `train --click` for the model's fit document.
pub fn click_scores(
    block: &decoder_core::Block,
    source: &std::path::Path,
    lags: usize,
    shrinkage: f64,
    folds: usize,
) -> Result<decoder_core::fit::click::ClickScores> {
    use decoder_core::engine::slot_engine::ClickGateSettings;
    use decoder_core::fit::click::{CATCH_MS, cross_validate_click};
    let block = block.valid_only();
    if block.input != decoder_core::wire::packet::BinKind::Counts {
        anyhow::bail!(
            "{}: the click decoder reads spike counts, and this block holds features",
            source.display()
        );
    }
    let cued = click_cues(&block, source)?;
    let gate = ClickGateSettings::default().gate(block.bin_width);
    cross_validate_click(
        &block.counts,
        block.n_channels,
        cued,
        lags,
        shrinkage,
        folds,
        &gate,
        block.bin_width.ms(),
        CATCH_MS,
    )
    .with_context(|| format!("cross-validating clicks on {}", source.display()))
}
