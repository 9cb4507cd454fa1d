//! The few operating-system calls the daemon needs beyond std: the
//! monotonic clock as nanoseconds (the same CLOCK_MONOTONIC the front end
//! stamps `origin_ns` with), socket waits with nanosecond timeouts, and the
//! opt-in real-time settings (CPU pinning, mlockall, SCHED_FIFO). Each
//! real-time setting that the OS refuses is a warning, not a failure: the
//! daemon still runs, only with less timing margin.

use std::os::fd::AsRawFd;
use std::time::Duration;

use crate::config::RealtimeConfig;

/// CLOCK_MONOTONIC in ns.
pub fn monotonic_ns() -> u64 {
    let mut ts = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: `ts` is a valid, writable timespec; CLOCK_MONOTONIC exists on
    // every Linux and cannot fail with a valid pointer.
    unsafe { libc::clock_gettime(libc::CLOCK_MONOTONIC, &mut ts) };
    ts.tv_sec as u64 * 1_000_000_000 + ts.tv_nsec as u64
}

/// Waits up to `timeout` for any of `fds` to be readable; says which
/// are. An interrupted wait is a wait with nothing readable. `ppoll` takes
/// a timespec, so a wait of 300 µs is 300 µs (plus the thread's timer
/// slack), where a socket read timeout rounds to jiffies.
pub fn wait_readable<const N: usize>(
    fds: [&dyn AsRawFd; N],
    timeout: Duration,
) -> std::io::Result<[bool; N]> {
    let mut polls = fds.map(|f| libc::pollfd {
        fd: f.as_raw_fd(),
        events: libc::POLLIN,
        revents: 0,
    });
    let ts = libc::timespec {
        tv_sec: timeout.as_secs() as libc::time_t,
        tv_nsec: timeout.subsec_nanos() as libc::c_long,
    };
    // SAFETY: N valid pollfds, a valid timespec, and no signal mask.
    let n = unsafe { libc::ppoll(polls.as_mut_ptr(), N as libc::nfds_t, &ts, std::ptr::null()) };
    if n < 0 {
        let err = std::io::Error::last_os_error();
        if err.kind() == std::io::ErrorKind::Interrupted {
            return Ok([false; N]);
        }
        return Err(err);
    }
    Ok(polls.map(|f| n > 0 && f.revents & libc::POLLIN != 0))
}

/// Sets the calling thread's timer slack to 1 ns so timed waits wake on
/// time (the default slack is 50 µs).
pub fn tighten_timer_slack() {
    // SAFETY: PR_SET_TIMERSLACK takes one integer argument and only affects
    // the calling thread.
    unsafe { libc::prctl(libc::PR_SET_TIMERSLACK, 1 as libc::c_ulong, 0, 0, 0) };
}

/// Applies the opt-in real-time settings to the calling thread; returns a
/// warning for each one the OS refused.
pub fn apply_realtime(cfg: &RealtimeConfig) -> Vec<String> {
    let mut warnings = Vec::new();
    if let Some(cpu) = cfg.cpu {
        let ok = core_affinity::get_core_ids()
            .and_then(|ids| ids.into_iter().find(|c| c.id == cpu))
            .is_some_and(core_affinity::set_for_current);
        if !ok {
            warnings.push(format!(
                "realtime.cpu = {cpu}: could not pin the decode thread to that CPU; it runs unpinned"
            ));
        }
    }
    if cfg.mlockall {
        // SAFETY: mlockall takes flags only; failure is reported via errno.
        let rc = unsafe { libc::mlockall(libc::MCL_CURRENT | libc::MCL_FUTURE) };
        if rc != 0 {
            warnings.push(format!(
                "realtime.mlockall: refused by the OS ({}); memory may be paged out. Run with CAP_IPC_LOCK or a higher memlock limit",
                std::io::Error::last_os_error()
            ));
        }
    }
    if let Some(priority) = cfg.fifo_priority {
        let param = libc::sched_param {
            sched_priority: priority,
        };
        // SAFETY: `param` is a valid sched_param; pid 0 is this thread.
        let rc = unsafe { libc::sched_setscheduler(0, libc::SCHED_FIFO, &param) };
        if rc != 0 {
            warnings.push(format!(
                "realtime.fifo_priority = {priority}: SCHED_FIFO refused by the OS ({}); the decode thread runs at normal priority. Run with CAP_SYS_NICE or an rtprio limit",
                std::io::Error::last_os_error()
            ));
        }
    }
    warnings
}

/// Runs `f` with the process umask set to `mask`, then restores it (used to
/// create the control socket with mode 0600 from the start).
pub fn with_umask<T>(mask: libc::mode_t, f: impl FnOnce() -> T) -> T {
    // SAFETY: umask only swaps the process's file creation mask.
    let old = unsafe { libc::umask(mask) };
    let out = f();
    // SAFETY: as above, restoring the previous mask.
    unsafe { libc::umask(old) };
    out
}

/// Resident set size of this process in bytes (from /proc/self/statm).
pub fn rss_bytes() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/self/statm").ok()?;
    let pages: u64 = text.split_whitespace().nth(1)?.parse().ok()?;
    // SAFETY: sysconf with a valid name has no preconditions.
    let page = unsafe { libc::sysconf(libc::_SC_PAGESIZE) };
    Some(pages * page.max(1) as u64)
}
