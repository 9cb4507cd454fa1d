//! The rig around a daemon under test, without the rig: a launcher that
//! brings `decoderd` up on loopback (as its own process, or on threads of
//! the caller when no binary is at hand), a paced front end that sends bin
//! packets on the bin clock with an optional fault schedule, an actuator
//! sink that times every velocity packet, and the loopback floor (the same
//! traffic through a relay that does not decode).
//!
//! The daemon's integration tests, its latency benchmark and
//! `replay-tool`'s `bench`, `stream`, `closed-loop` and `demo` verbs all
//! drive the daemon through this crate, so their figures mean the same
//! thing. None of it is in the daemon itself: a rig's decoderd carries no
//! test drivers.

pub mod actuator;
pub mod floor;
pub mod front_end;
pub mod launcher;
pub mod protocol;

pub use actuator::{ActuatorSink, SinkRecord};
pub use floor::loopback_floor;
pub use front_end::{BinFault, paced_send, paced_send_from};
pub use launcher::{Launch, RunningDaemon, Stopped};
