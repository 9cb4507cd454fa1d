//! `replay-tool`: parse the command line, install logging, run the verb and
//! map the outcome to an exit code (0 ok, 1 failed check, 2 user error).

use clap::Parser;

fn main() -> std::process::ExitCode {
    let cli = replay_tool::Cli::parse();
    replay_tool::init_logging(cli.verbose);
    replay_tool::run(cli)
}
