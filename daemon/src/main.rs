//! `decoderd` entry point: parse the command line and hand over to the
//! library, which does everything else.

use clap::Parser;

#[global_allocator]
static ALLOCATOR: daemon::alloc_count::CountingAllocator = daemon::alloc_count::CountingAllocator;

fn main() -> std::process::ExitCode {
    daemon::alloc_count::mark_installed();
    daemon::main_with(daemon::Cli::parse())
}
