//go:build !unix

package alerts

import (
	"fmt"
	"os"
)

// lockDir opens the lock file without locking it: only unix systems, where
// trapline runs in production, get the flock that keeps a second process off
// the spool.
func lockDir(path string) (*os.File, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o640)
	if err != nil {
		return nil, fmt.Errorf("lock: %w", err)
	}
	return f, nil
}
