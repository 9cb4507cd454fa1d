//! The decoding core: everything between a bin's counts and a velocity
//! estimate, and everything needed to get a decoder trained and checked.
//!
//! Rooms, from the per-bin code up:
//! - [`linalg`] and [`bin_width`]: the small dense linear algebra and the
//!   one bin-width type every room shares;
//! - [`wire`]: the bin, velocity and task packets and the protocol's
//!   limits;
//! - [`decoders`]: each decoder's model and its per-bin filter;
//! - [`engine`]: the decode pipeline, the safety supervisor and the slot
//!   engine that the daemon and every replay run;
//! - [`formats`]: the files: the calibration block directory, the session
//!   log and the model file (above the engine: the log records what the
//!   engine handled);
//! - [`fit`]: training, evaluation and goodness of fit (offline only);
//! - [`sim`]: synthetic blocks and a simulated user (offline only).
//!
//! What is pure: `linalg`, `decoders` and `engine` do no I/O and read no
//! clock; time comes in as data, so a replay reproduces a live session bit
//! for bit. `formats` parses bytes and reads and writes files (NumPy, TOML,
//! CSV), and `fit` reads its TOML configuration; none of the crate opens a
//! socket, starts a thread pool of its own for the per-bin path, or runs
//! an async runtime.

pub mod bin_width;
pub mod decoders;
pub mod engine;
pub mod fit;
pub mod formats;
pub mod linalg;
pub mod session;
pub mod sim;
pub mod wire;

pub use bin_width::BinWidth;
pub use decoders::DecoderModel;
pub use engine::pipeline::{BinEstimate, DecodePipeline, PipelineError};
pub use fit::TrainError;
pub use formats::block::{Block, BlockError};
pub use formats::model_file::{ModelFile, ModelFileError, Provenance};
