//! The bytes and files that cross the crate's edge: bin, velocity, task
//! and operator packets, the calibration block directory, the session log and
//! the model file. Parsers here check every length, magic and version before
//! they trust a field, and their errors name the file or field at fault.
//! These parse and encode; reading files from disk happens here too (the
//! block directory, the model file), but nothing here opens a socket.

pub mod block;
pub mod block_rows;
pub mod log_block;
pub mod model_file;
pub mod npy_stream;
pub mod packet;
pub mod session_log;
pub mod task_packet;
