//! Panics turned into errors: a defect of varpost (a panic anywhere in a run, on any thread that the run
//! waits for) ends the process promptly with [`Error::Internal`], naming the panic's message and where
//! it happened, instead of a backtrace dump, a hang or an abort.
//!
//! The panic hook ([`install_hook`]) records the first panic's message, location and thread instead of
//! printing it; [`catch`] catches the unwinding at the top of a call and builds the error from that
//! record (or from the panic's payload alone where the hook is not installed, as in library use).

use std::any::Any;
use std::panic::{self, AssertUnwindSafe};
use std::sync::{Mutex, Once};

use crate::error::{Error, Result};

/// The first panic since the last [`catch`] took it: message, location and thread.
static FIRST_PANIC: Mutex<Option<String>> = Mutex::new(None);
static HOOK: Once = Once::new();

/// Replaces the panic hook of the process by one that records the panic for [`catch`] (with a
/// backtrace when `RUST_BACKTRACE` asks for one) and prints nothing. Called once by the command line.
pub fn install_hook() {
    HOOK.call_once(|| {
        panic::set_hook(Box::new(|info| {
            let message = payload_text(info.payload());
            let place = info
                .location()
                .map_or_else(|| "an unknown place".to_string(), |l| l.to_string());
            let thread = std::thread::current()
                .name()
                .map(|n| format!(" (thread '{n}')"))
                .unwrap_or_default();
            let mut text = format!("panic at {place}{thread}: {message}");
            let trace = std::backtrace::Backtrace::capture();
            if trace.status() == std::backtrace::BacktraceStatus::Captured {
                text.push_str(&format!("\nbacktrace:\n{trace}"));
            }
            if let Ok(mut slot) = FIRST_PANIC.lock() {
                slot.get_or_insert(text);
            }
        }));
    });
}

/// Runs `f`; a panic inside it (or re-raised by it from a thread it waited for) becomes
/// [`Error::Internal`] with the first recorded panic's message and location.
pub fn catch<T>(f: impl FnOnce() -> Result<T>) -> Result<T> {
    match panic::catch_unwind(AssertUnwindSafe(f)) {
        Ok(r) => r,
        Err(payload) => {
            let recorded = FIRST_PANIC.lock().ok().and_then(|mut s| s.take());
            Err(Error::Internal(recorded.unwrap_or_else(|| {
                format!("panic: {}", payload_text(payload.as_ref()))
            })))
        }
    }
}

/// A panic recorded by the hook and not reported by [`catch`] (one on a thread the run did not wait
/// for), taken so that it is reported once.
pub fn take_unreported() -> Option<String> {
    FIRST_PANIC.lock().ok().and_then(|mut s| s.take())
}

fn payload_text(payload: &(dyn Any + Send)) -> String {
    if let Some(s) = payload.downcast_ref::<&str>() {
        (*s).to_string()
    } else if let Some(s) = payload.downcast_ref::<String>() {
        s.clone()
    } else {
        "(a panic without a message)".to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The hook is not installed here (it would silence the test harness's own panic output), so the
    // error carries the payload alone.
    #[test]
    fn a_panic_becomes_an_internal_error_with_its_message() {
        let e = catch::<()>(|| panic!("broken invariant {}", 7)).unwrap_err();
        assert!(matches!(e, Error::Internal(_)));
        assert!(e.to_string().contains("broken invariant 7"), "{e}");
        let e = catch::<()>(|| std::panic::panic_any(3_u8)).unwrap_err();
        assert!(e.to_string().contains("without a message"), "{e}");
        assert_eq!(catch(|| Ok(5)).unwrap(), 5);
    }
}
