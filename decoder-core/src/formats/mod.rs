//! The files that cross the crate's edge: the calibration block directory,
//! the session log and the model file. Parsers here check every length,
//! magic and version before they trust a field, and their errors name the
//! file or field at fault. This floor stands above the engine (a session
//! log is the engine's records written down; a model file builds the
//! engine's pipeline) and below the offline rooms; the packets are on the
//! wire floor below both. Nothing here opens a socket.

pub mod block;
pub mod block_dir;
pub mod block_rows;
pub mod log_block;
pub mod log_replay;
pub mod model_file;
pub mod npy_stream;
pub mod session_log;
