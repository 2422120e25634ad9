//! The `understudy` binary: the command line of [`understudy::cli`], with its allocator.
//!
//! `serve` and `demo` allocate with mimalloc, every other command with the system's (glibc's)
//! malloc. Under scoring load a score's record is allocated on a request's worker thread and
//! freed on the recorder's; glibc frees it into the worker's arena under that arena's lock,
//! mimalloc hands it back without one. The service took about 0.8 us less CPU per request
//! with mimalloc (BENCHMARKS.md, "mimalloc, one pass over the body, larger record batches").
//! A one-run command (`train`, `import`, `backtest`, …) is the other way round: mimalloc's
//! defaults keep freed memory a while and commit whole arenas, which raised the peak memory of
//! `train` on 100,000 x 30 from 67 to 93 MB (over the 3 x the matrix it must stay within); its
//! settings that give memory back at once brought that to 72 MB but cost the service 2 us a
//! request.
//!
//! So the allocator is chosen from the command's name before the first allocation, and kept:
//! asking mimalloc on every free whether a block is its own, so as to switch later, cost the
//! service 0.15 us a request.

use std::alloc::{GlobalAlloc, Layout, System};
use std::ffi::{c_char, c_int, CStr};
use std::sync::atomic::{AtomicU8, Ordering};

use mimalloc::MiMalloc;

/// Which allocator the process uses: undecided until the initialiser below or the first
/// allocation, whichever comes first, then fixed.
static CHOSEN: AtomicU8 = AtomicU8::new(UNDECIDED);
const UNDECIDED: u8 = 0;
const SYSTEM: u8 = 1;
const MIMALLOC: u8 = 2;

/// The commands that run the service, by the name that selects them (`cli::Command`).
const SERVICE_COMMANDS: [&[u8]; 2] = [b"serve", b"demo"];

/// The system allocator, or mimalloc when the process was started as a service and nothing
/// was allocated before that was known. Every block is freed by the allocator that made it:
/// the choice never changes once a block exists.
struct ByCommand;

impl ByCommand {
    fn mimalloc() -> bool {
        match CHOSEN.load(Ordering::Relaxed) {
            MIMALLOC => true,
            SYSTEM => false,
            // An allocation before the choice: the system's, and so from now on.
            _ => match CHOSEN.compare_exchange(
                UNDECIDED,
                SYSTEM,
                Ordering::AcqRel,
                Ordering::Acquire,
            ) {
                Ok(_) => false,
                Err(chosen) => chosen == MIMALLOC,
            },
        }
    }
}

// SAFETY: every call goes to one of two sound allocators, and as the choice is made before
// the first block and never changes, a block is always freed or resized by its maker.
unsafe impl GlobalAlloc for ByCommand {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        if Self::mimalloc() {
            MiMalloc.alloc(layout)
        } else {
            System.alloc(layout)
        }
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        if Self::mimalloc() {
            MiMalloc.alloc_zeroed(layout)
        } else {
            System.alloc_zeroed(layout)
        }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        if Self::mimalloc() {
            MiMalloc.dealloc(ptr, layout)
        } else {
            System.dealloc(ptr, layout)
        }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        if Self::mimalloc() {
            MiMalloc.realloc(ptr, layout, new_size)
        } else {
            System.realloc(ptr, layout, new_size)
        }
    }
}

#[global_allocator]
static ALLOCATOR: ByCommand = ByCommand;

/// Chooses the allocator from the command's name (the first argument): glibc runs the
/// binary's initialisers with `argc` and `argv` before `main`, and before Rust's runtime
/// allocates anything. Only with glibc (another C library may pass no arguments; the system
/// allocator then stays).
#[cfg(all(target_os = "linux", target_env = "gnu"))]
#[used]
#[link_section = ".init_array"]
static CHOOSE_ALLOCATOR: extern "C" fn(c_int, *const *const c_char) = choose_allocator;

#[cfg_attr(not(all(target_os = "linux", target_env = "gnu")), allow(dead_code))]
extern "C" fn choose_allocator(argc: c_int, argv: *const *const c_char) {
    if argc < 2 || argv.is_null() {
        return;
    }
    // SAFETY: glibc passes the process's `argv`, `argc` entries of NUL-terminated strings.
    let command = unsafe {
        let arg = *argv.add(1);
        if arg.is_null() {
            return;
        }
        CStr::from_ptr(arg).to_bytes()
    };
    let chosen = if SERVICE_COMMANDS.contains(&command) {
        MIMALLOC
    } else {
        SYSTEM
    };
    // Only if nothing was allocated yet (then the system's stays).
    let _ = CHOSEN.compare_exchange(UNDECIDED, chosen, Ordering::AcqRel, Ordering::Acquire);
}

fn main() -> std::process::ExitCode {
    understudy::cli::main()
}
