package cli

import (
	"os"
	"path/filepath"
	"testing"
)

// TestWatchClientFromConfig checks that watch connects with the nats
// section of a configuration file: the same credentials and TLS files as
// the daemon, the file's prefix, and --nats-url over the file's url.
func TestWatchClientFromConfig(t *testing.T) {
	dir := t.TempDir()
	path, ca := filepath.Join(dir, "trapline.yaml"), filepath.Join(dir, "ca.pem")
	if err := os.WriteFile(ca, []byte("not checked here"), 0o600); err != nil {
		t.Fatal(err)
	}
	yaml := "nats:\n  url: nats://10.0.0.5:4222\n  subject_prefix: lab\n  token: s3cret\n  tls:\n    ca_file: " + ca + "\n"
	if err := os.WriteFile(path, []byte(yaml), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name    string
		urlSet  bool
		wantURL string
	}{
		{"file url", false, "nats://10.0.0.5:4222"},
		{"flag over file", true, "nats://127.0.0.1:4333"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			co, prefix, err := watchClient("nats://127.0.0.1:4333", path, tc.urlSet)
			if err != nil {
				t.Fatal(err)
			}
			if co.URL != tc.wantURL || co.Token != "s3cret" || co.TLS.CAFile != ca || prefix != "lab" {
				t.Errorf("got %+v prefix %q", co, prefix)
			}
		})
	}
	if co, prefix, err := watchClient("nats://127.0.0.1:4222", "", false); err != nil || co.URL != "nats://127.0.0.1:4222" || prefix != "" {
		t.Errorf("without a file: %+v %q %v", co, prefix, err)
	}
}
