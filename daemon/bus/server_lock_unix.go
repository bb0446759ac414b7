//go:build unix

package bus

import (
	"errors"
	"fmt"
	"os"
	"syscall"
)

// lockStore takes an exclusive, non-blocking flock on path. nats-server
// itself lets two servers open the same JetStream directory, which would
// corrupt it; the kernel drops the lock however the process ends.
func lockStore(path string) (*os.File, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o640)
	if err != nil {
		return nil, fmt.Errorf("lock %s: %w", path, err)
	}
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		_ = f.Close()
		if errors.Is(err, syscall.EWOULDBLOCK) {
			return nil, ErrStoreLocked
		}
		return nil, fmt.Errorf("lock %s: %w", path, err)
	}
	return f, nil
}
