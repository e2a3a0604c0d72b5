//! The `modalmap` binary: parse, run, map errors to exit codes. All work is in the library.

use std::process::ExitCode;

fn main() -> ExitCode {
    // A closed pipe (`modalmap inspect f | head`) ends the program quietly, as for any
    // Unix tool, instead of a write error.
    // SAFETY: setting a signal's disposition to the default before any thread starts.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let cli = modalmap::cli::parse();
    // SIGINT, SIGTERM, SIGHUP: remove this run's temporary files, leave OUT as it was.
    modalmap::cleanup::on_signals();
    // A panic is a bug; it must still end with a clear message and the documented code.
    std::panic::set_hook(Box::new(|info| {
        eprintln!("error: internal error ({info})");
        eprintln!("  fix: this is a bug in modalmap; please report it with the command you ran");
    }));
    match std::panic::catch_unwind(|| modalmap::cli::run(cli)) {
        Ok(Ok(code)) => ExitCode::from(code),
        Ok(Err(e)) => {
            eprintln!("error: {e}");
            ExitCode::from(e.kind.exit_code())
        }
        Err(_) => ExitCode::from(modalmap::ErrorKind::Internal.exit_code()),
    }
}
