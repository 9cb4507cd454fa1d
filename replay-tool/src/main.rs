//! `replay-tool`: parse the command line, install logging, run the verb and
//! map the outcome to an exit code (0 ok, 1 failed check, 2 user error).

use clap::Parser;

fn main() -> std::process::ExitCode {
    // Piped into `head`, a tool should stop quietly when the reader goes,
    // as other Unix tools do, rather than panic on a broken pipe.
    // SAFETY: restoring the default disposition of SIGPIPE before any other
    // thread exists.
    unsafe { libc::signal(libc::SIGPIPE, libc::SIG_DFL) };
    let cli = replay_tool::Cli::parse();
    replay_tool::init_logging(cli.verbose);
    replay_tool::run(cli)
}
