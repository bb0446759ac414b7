//go:build unix

package alerts

import (
	"errors"
	"fmt"
	"os"
	"syscall"
)

// lockDir takes an exclusive, non-blocking flock on path. The kernel releases
// it when the process dies, however it dies, so a crashed daemon never leaves
// a stale lock behind.
func lockDir(path string) (*os.File, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o640)
	if err != nil {
		return nil, fmt.Errorf("lock: %w", err)
	}
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		_ = f.Close()
		if errors.Is(err, syscall.EWOULDBLOCK) {
			return nil, ErrSpoolLocked
		}
		return nil, fmt.Errorf("lock %s: %w", path, err)
	}
	return f, nil
}
