package config

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/spf13/pflag"
)

// perturb changes a leaf value in place; it reports false for values it
// cannot change (not addressable, or of a kind it does not know).
func perturb(v reflect.Value) bool {
	if !v.CanSet() {
		return false
	}
	switch v.Kind() {
	case reflect.Bool:
		v.SetBool(!v.Bool())
	case reflect.Int, reflect.Int64, reflect.Int32:
		v.SetInt(v.Int() + 1)
	case reflect.Uint, reflect.Uint64, reflect.Uint32:
		v.SetUint(v.Uint() + 1)
	case reflect.Float64:
		v.SetFloat(v.Float() + 0.25)
	case reflect.String:
		v.SetString(v.String() + "x")
	default:
		return false
	}
	return true
}

// TestDigestCoversExactlyTheAnalysisSettings changes every key, one at a
// time: the digest changes for each key of analysis, detectors and alarms,
// and for no other key.
func TestDigestCoversExactlyTheAnalysisSettings(t *testing.T) {
	base := Default().Digest()
	if len(base) != DigestLen {
		t.Fatalf("digest %q: want %d hex digits", base, DigestLen)
	}
	inside, outside := 0, 0
	for _, key := range Keys() {
		c := Default()
		changed := false
		walkLeaves(reflect.ValueOf(c).Elem(), "", func(k string, v reflect.Value) {
			if k == key {
				changed = perturb(v)
			}
		})
		if !changed {
			continue
		}
		in := inSections(key, DigestSections)
		if got := c.Digest(); (got != base) != in {
			t.Errorf("changing %s: digest %s, default %s; want changed = %v", key, got, base, in)
		}
		if in {
			inside++
		} else {
			outside++
		}
	}
	if inside < 30 || outside < 20 {
		t.Errorf("only %d analysis keys and %d other keys were changed", inside, outside)
	}
}

// TestDigestFromFiles loads configurations: one detector threshold changes
// the digest; the NATS url, the streams and the log level do not; the same
// value written another way (a duration in other units) gives the same
// digest.
func TestDigestFromFiles(t *testing.T) {
	dir := t.TempDir()
	load := func(name, body string) string {
		t.Helper()
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(body), 0o600); err != nil {
			t.Fatal(err)
		}
		c, err := Load(p, nil)
		if err != nil {
			t.Fatal(err)
		}
		return c.Digest()
	}
	base := Default().Digest()
	if d := load("threshold.yaml", "detectors:\n  air_trapping:\n    peepi_cmh2o: 2.5\n"); d == base {
		t.Error("a changed detector threshold kept the digest")
	}
	unrelated := "nats:\n  url: nats://127.0.0.1:4333\nlog:\n  level: debug\nstreams:\n  - id: bed-1\n    source: stdin://\n"
	if d := load("unrelated.yaml", unrelated); d != base {
		t.Errorf("NATS url, log level and streams changed the digest: %s, want %s", d, base)
	}
	y := load("same.yaml", "detectors:\n  air_trapping:\n    peepi_cmh2o: 2.5\nlog: {level: warn}\n")
	j := load("same.json", `{"log": {"level": "error"}, "detectors": {"air_trapping": {"peepi_cmh2o": 2.50}}}`)
	if y != j {
		t.Errorf("the same threshold in YAML and JSON gave digests %s and %s", y, j)
	}
}

// TestCanonicalIsSortedJSON checks the canonical encoding against
// encoding/json's own reading: an object whose keys come in sorted order.
func TestCanonicalIsSortedJSON(t *testing.T) {
	c := Default()
	b := CanonicalAnalysis(c.Analysis, c.Detectors, c.Alarms)
	var m map[string]any
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	dec := json.NewDecoder(bytes.NewReader(b))
	_, _ = dec.Token()
	prev := ""
	for dec.More() {
		tok, _ := dec.Token()
		key := tok.(string)
		if key <= prev || !inSections(key, DigestSections) {
			t.Fatalf("key %q after %q", key, prev)
		}
		prev = key
		var skip json.RawMessage
		_ = dec.Decode(&skip)
	}
}

func TestProgramVersion(t *testing.T) {
	if v := ProgramVersion(); v == "" || strings.ContainsAny(v, " \n") {
		t.Errorf("version %q", v)
	}
	old := BuildVersion
	BuildVersion = "v9.9.9"
	defer func() { BuildVersion = old }()
	if v := ProgramVersion(); !strings.HasPrefix(v, "v9.9.9") {
		t.Errorf("version %q does not start with the build version", v)
	}
}

// TestEffectiveOrigins names the layer of each value.
func TestEffectiveOrigins(t *testing.T) {
	file := filepath.Join(t.TempDir(), "c.yaml")
	body := "data_dir: /from/file\nnats: {user: u, password: s3cret}\nstreams:\n  - id: bed-1\n    source: stdin://\n"
	if err := os.WriteFile(file, []byte(body), 0o600); err != nil {
		t.Fatal(err)
	}
	t.Setenv("TRAPLINE_SHUTDOWN_TIMEOUT", "30s")
	fs := pflag.NewFlagSet("run", pflag.ContinueOnError)
	fs.String("log-level", "info", "")
	if err := fs.Parse([]string{"--log-level=warn"}); err != nil {
		t.Fatal(err)
	}
	c, settings, err := LoadEffective(file, fs)
	if err != nil {
		t.Fatal(err)
	}
	if c.ShutdownTimeout != 30*time.Second {
		t.Fatalf("shutdown_timeout %v", c.ShutdownTimeout)
	}
	want := map[string][3]string{
		"data_dir":          {"/from/file", "file", file},
		"shutdown_timeout":  {"30s", "env", "TRAPLINE_SHUTDOWN_TIMEOUT"},
		"log.level":         {"warn", "flag", "--log-level"},
		"log.format":        {"auto", "default", ""},
		"streams[0].source": {"stdin://", "file", file},
		"nats.password":     {"(set, hidden)", "file", file},
	}
	seen := 0
	for i, s := range settings {
		if i > 0 && settings[i-1].Key >= s.Key {
			t.Errorf("not sorted: %s after %s", s.Key, settings[i-1].Key)
		}
		if w, ok := want[s.Key]; ok {
			seen++
			if s.Value != w[0] || string(s.Origin) != w[1] || s.From != w[2] {
				t.Errorf("%s = %q from %s %q, want %q from %s %q", s.Key, s.Value, s.Origin, s.From, w[0], w[1], w[2])
			}
		}
	}
	if seen != len(want) {
		t.Errorf("found %d of the %d keys checked", seen, len(want))
	}
	for _, format := range []string{"text", "json", "yaml"} {
		var b bytes.Buffer
		if err := WriteSettings(&b, settings, format); err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(b.String(), "TRAPLINE_SHUTDOWN_TIMEOUT") || strings.Contains(b.String(), "s3cret") {
			t.Errorf("%s output lacks the origin or shows the password:\n%s", format, b.String())
		}
	}
	var back []Setting
	var b bytes.Buffer
	_ = WriteSettings(&b, settings, "json")
	if err := json.Unmarshal(b.Bytes(), &back); err != nil || !reflect.DeepEqual(back, settings) {
		t.Errorf("JSON does not read back: %v", err)
	}
}
