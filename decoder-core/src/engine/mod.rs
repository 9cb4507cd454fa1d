//! The per-bin engine that the daemon and every offline replay run: the
//! decode pipeline (one bin's counts in, a velocity estimate out), the
//! safety supervisor (estimate in, bounded command out), the slot engine
//! (datagrams and times in, one velocity packet per bin slot out), and the
//! replay of a session log through that same slot engine.
//!
//! **Invariant**: nothing here imports [`crate::fit`] or [`crate::sim`]; the
//! code that runs next to a participant depends only on the decoders, the
//! packet and log formats and the linear algebra. `.ci/run` checks this.

pub mod drift;
pub mod pipeline;
pub mod session_replay;
pub mod slot_engine;
pub mod supervisor;
