//go:build !unix

package bus

import (
	"fmt"
	"os"
)

// lockStore opens the lock file without locking it: only unix systems get
// the flock that keeps a second server off the JetStream directory.
func lockStore(path string) (*os.File, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o640)
	if err != nil {
		return nil, fmt.Errorf("lock %s: %w", path, err)
	}
	return f, nil
}
