package record

import (
	"context"
	osexec "os/exec"
	"testing"
	"time"
)

// exec runs a system command with a bounded wait.
func exec(t *testing.T, name string, args ...string) ([]byte, error) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	return osexec.CommandContext(ctx, name, args...).CombinedOutput()
}
