package cli

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestConfigShowSources shows a value from each layer with its origin, and
// config check reports every problem by key with exit 2.
func TestConfigShowSources(t *testing.T) {
	dir := t.TempDir()
	file := filepath.Join(dir, "t.yaml")
	if err := os.WriteFile(file, []byte("data_dir: "+dir+"\nhttp:\n  listen: 127.0.0.1:9\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	t.Setenv("TRAPLINE_HTTP_LISTEN", "127.0.0.1:9100")
	out := run(t, ExitOK, nil, "config", "show", "--config", file, "--format", "json", "--nats-url", "nats://127.0.0.1:4333")
	var settings []struct{ Key, Value, Origin, From string }
	if err := json.Unmarshal([]byte(out), &settings); err != nil {
		t.Fatalf("%v: %s", err, out)
	}
	want := map[string][2]string{
		"data_dir":                 {dir, "file"},
		"http.listen":              {"127.0.0.1:9100", "env"},
		"nats.url":                 {"nats://127.0.0.1:4333", "flag"},
		"nats.subject_prefix":      {"trapline", "default"},
		"detectors.air_trapping.n": {"4", "default"},
	}
	for _, s := range settings {
		if w, ok := want[s.Key]; ok {
			if s.Value != w[0] || s.Origin != w[1] {
				t.Errorf("%s = %q from %s, want %q from %s", s.Key, s.Value, s.Origin, w[0], w[1])
			}
			delete(want, s.Key)
		}
	}
	if len(want) > 0 {
		t.Errorf("keys not shown: %v", want)
	}
	if text := run(t, ExitOK, nil, "config", "show"); !strings.Contains(text, "ORIGIN") {
		t.Errorf("text output lacks its header:\n%s", text)
	}

	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte("streams:\n  - id: a\n    sourcee: x\ndetectors:\n  air_trapping:\n    n: four\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	var stderr strings.Builder
	if code := Run(t.Context(), []string{"config", "check", bad}, nil, &strings.Builder{}, &stderr); code != ExitUsage {
		t.Fatalf("check of a bad file: exit %d, want 2", code)
	}
	for _, key := range []string{`streams[0].sourcee: unknown key (did you mean "source"?)`, "detectors.air_trapping.n:", "2 problems"} {
		if !strings.Contains(stderr.String(), key) {
			t.Errorf("check output lacks %q:\n%s", key, stderr.String())
		}
	}
	if out := run(t, ExitOK, nil, "config", "check", file); !strings.Contains(out, "valid") {
		t.Errorf("check of a good file: %q", out)
	}
}
