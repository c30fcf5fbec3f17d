//! A pseudo-terminal pair standing in for a serial gauge's adapter.

use std::ffi::CStr;

/// A pty pair: the master's file descriptor and the slave's path.
pub struct Pty {
    master: i32,
    pub path: String,
}

impl Pty {
    pub fn open() -> Pty {
        let (mut master, mut slave) = (0, 0);
        let mut name = [0 as libc::c_char; 128];
        // Raw from the start, like a real serial line: bytes written before the daemon opens
        // the port must not be rewritten by a cooked line discipline (\r to \n).
        // SAFETY: a zeroed termios is a valid argument for cfmakeraw, which fills it in.
        let mut raw: libc::termios = unsafe { std::mem::zeroed() };
        unsafe { libc::cfmakeraw(&mut raw) };
        // SAFETY: openpty writes two descriptors and a NUL-terminated name into the buffers
        // given; the buffer is larger than any pts path.
        let rc = unsafe {
            libc::openpty(
                &mut master,
                &mut slave,
                name.as_mut_ptr(),
                &raw,
                std::ptr::null(),
            )
        };
        assert_eq!(rc, 0, "openpty failed");
        // SAFETY: openpty NUL-terminated the name. The slave is closed here: the daemon opens
        // the path itself.
        let path = unsafe { CStr::from_ptr(name.as_ptr()) }
            .to_string_lossy()
            .into_owned();
        unsafe { libc::close(slave) };
        Pty { master, path }
    }

    pub fn write(&self, text: &str) {
        // SAFETY: writes from a valid buffer to the open master descriptor.
        let n = unsafe { libc::write(self.master, text.as_ptr().cast(), text.len()) };
        assert_eq!(n as usize, text.len());
    }

    /// Closes the master: to the port's reader this is an unplugged adapter.
    pub fn unplug(self) {
        // SAFETY: closes the descriptor openpty gave us, once.
        unsafe { libc::close(self.master) };
    }
}
