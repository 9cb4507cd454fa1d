//! `decoderd`: the program between the spike front end and the actuator.
//!
//! [`run()`] ([`start()`] and a wait) loads the model, binds the sockets,
//! opens the session log and starts three kinds of work: the real-time loop on its own thread
//! ([`rt_loop`]), the recorder's writer thread ([`recorder`]), and a
//! single-threaded tokio runtime for the control socket, the periodic
//! summary line and signals ([`control`]). The decode logic itself is
//! `decoder_core::engine::slot_engine`, shared with offline replay.

pub mod adaptation;
pub mod alloc_count;
pub mod cli;
pub mod config;
pub mod control;
mod event_log;
pub mod model_identity;
pub mod recorder;
pub mod reduction;
pub mod requests;
pub mod rt_loop;
pub mod start;
pub mod status;
pub mod sys;
pub mod watch;

pub use cli::{
    Cli, Command, CtlAction, CtlArgs, RunArgs, Switch, ctl, init_logging, main_with, prepare,
};
pub use start::{DaemonHandle, run, start};

pub const VERSION: &str = env!("CARGO_PKG_VERSION");
