package simulator

import (
	"os"

	"golang.org/x/sys/unix"
)

// inputQueued returns the number of bytes waiting in a terminal's input
// queue (TIOCINQ).
func inputQueued(f *os.File) (int, error) {
	return unix.IoctlGetInt(int(f.Fd()), unix.TIOCINQ)
}

// writeNonBlocking writes as much of p as the terminal takes now and
// returns at once: EAGAIN (buffer full, no reader) is not an error, the
// rest is left unwritten.
func writeNonBlocking(f *os.File, p []byte) (int, error) {
	rc, err := f.SyscallConn()
	if err != nil {
		return 0, err
	}
	var n int
	var werr error
	cerr := rc.Control(func(fd uintptr) {
		if werr = unix.SetNonblock(int(fd), true); werr != nil {
			return
		}
		for n < len(p) {
			k, err := unix.Write(int(fd), p[n:])
			if k > 0 {
				n += k
			}
			switch {
			case err == unix.EINTR:
				continue
			case err == unix.EAGAIN:
				return
			case err != nil:
				werr = err
				return
			case k <= 0:
				return
			}
		}
	})
	if cerr != nil {
		return n, cerr
	}
	return n, werr
}
