//go:build !linux

package simulator

import (
	"errors"
	"os"
)

// inputQueued is not available here: the pty output does not wait for its
// reader before a disconnection or at the end of a run.
func inputQueued(*os.File) (int, error) {
	return 0, errors.ErrUnsupported
}

// writeNonBlocking is a plain write here.
func writeNonBlocking(f *os.File, p []byte) (int, error) { return f.Write(p) }
