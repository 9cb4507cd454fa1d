//! Sessions as the offline verbs use them: one way to open what a user
//! names with `--session` (a session directory or a session log), one
//! replay of a block's rows through the per-bin pipeline, and the checks a
//! block and a model must pass together. The top offline floor: it stands
//! on the formats, the engine and the fits, and the tool's verbs call it
//! and print.

pub mod open;
pub mod replay;
pub mod train;
