//! `decoderd` entry point: parse the command line and hand over to the
//! library, which does everything else.

use clap::Parser;

fn main() -> std::process::ExitCode {
    daemon::main_with(daemon::Cli::parse())
}
