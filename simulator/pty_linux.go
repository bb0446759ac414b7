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
