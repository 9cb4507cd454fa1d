//! `decoderd` entry point: parse the command line and hand over to the
//! library, which does everything else.

use clap::Parser;

#[global_allocator]
static ALLOCATOR: daemon::alloc_count::CountingAllocator = daemon::alloc_count::CountingAllocator;

fn main() -> std::process::ExitCode {
    daemon::alloc_count::mark_installed();
    // A file-size limit reached by the recording must not kill the decoder:
    // ignored, the write fails with EFBIG, the recorder raises its alarm and
    // decoding goes on, as for a full disk.
    // SAFETY: setting a signal's disposition before any thread exists.
    unsafe { libc::signal(libc::SIGXFSZ, libc::SIG_IGN) };
    daemon::main_with(daemon::Cli::parse())
}
