//! The wire formats, the lowest floor above the bin width: the bin packet
//! the front end sends, the velocity packet the actuator follows and the
//! task packet the task computer sends (PROTOCOL.md §1, §2, §6), with the
//! protocol's limits (channels, dimensions, datagram sizes). Each parses
//! into a value or a typed reason and encodes into a caller's buffer,
//! without allocating, so the daemon and every offline replay read and
//! write the same bytes.
//!
//! **Invariant**: nothing here imports the decoders, the engine, the file
//! formats or the offline rooms; they all stand on this floor. `.ci/run`
//! checks it.

pub mod packet;
pub mod task_packet;
