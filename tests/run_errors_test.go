package tests

import (
	"context"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trapline/daemon/cli"
)

// writeConfig writes a YAML configuration into a temporary file.
func writeConfig(t *testing.T, yaml string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "trapline.yaml")
	if err := os.WriteFile(p, []byte(yaml), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

// TestRunRefusesBadStarts checks the exit code and message of every way
// `trapline run` can refuse to start.
func TestRunRefusesBadStarts(t *testing.T) {
	busy, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer busy.Close()
	dir := t.TempDir()

	for _, tc := range []struct {
		name     string
		yaml     string
		wantCode int
		want     []string
	}{
		{
			name: "every bad key named",
			yaml: fmt.Sprintf(`data_dir: %s
shutdown_timeout: -3s
htp:
  listen: 127.0.0.1:0
nats:
  embedded:
    port: 70000
streams:
  - id: "bed 1"
    source: tpc://127.0.0.1:5000
  - id: bed-2
    sourse: serial:///dev/ttyUSB0
`, dir),
			wantCode: cli.ExitUsage,
			want:     []string{"shutdown_timeout", "htp", "nats.embedded.port", "streams[0].id", "streams[0].source", "streams[1].sourse"},
		},
		{
			name:     "no stream configured",
			yaml:     fmt.Sprintf("data_dir: %s\n", dir),
			wantCode: cli.ExitUsage,
			want:     []string{"no stream configured", "streams:"},
		},
		{
			name: "http port in use",
			yaml: fmt.Sprintf(`data_dir: %s
http:
  listen: %s
nats:
  embedded:
    port: 0
streams:
  - id: bed-1
    source: tcp-listen://127.0.0.1:0
`, dir, busy.Addr()),
			wantCode: cli.ExitError,
			want:     []string{busy.Addr().String(), "already in use", "http.listen"},
		},
		{
			name: "nats port in use",
			yaml: fmt.Sprintf(`data_dir: %s
http:
  listen: ""
nats:
  embedded:
    port: %d
streams:
  - id: bed-1
    source: tcp-listen://127.0.0.1:0
`, dir, busy.Addr().(*net.TCPAddr).Port),
			wantCode: cli.ExitError,
			want:     []string{busy.Addr().String(), "in use", "nats.embedded.port"},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
			defer cancel()
			code, out := runDaemon(ctx, "run", "--config", writeConfig(t, tc.yaml))
			if code != tc.wantCode {
				t.Errorf("exit code %d, want %d; output:\n%s", code, tc.wantCode, out)
			}
			for _, w := range tc.want {
				if !strings.Contains(out, w) {
					t.Errorf("output lacks %q:\n%s", w, out)
				}
			}
		})
	}
}
