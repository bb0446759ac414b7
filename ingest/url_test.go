package ingest

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestParseURL(t *testing.T) {
	tests := []struct {
		raw  string
		want Spec
	}{
		{"serial:///dev/ttyUSB0?baud=115200&format=text", Spec{Scheme: "serial", Address: "/dev/ttyUSB0", Format: FormatText, Baud: 115200}},
		{"serial:///dev/ttyACM1?baud=921600&format=binary&stream=bed-4", Spec{Scheme: "serial", Address: "/dev/ttyACM1", Format: FormatBinary, Baud: 921600, Stream: "bed-4"}},
		{"tcp://10.0.0.7:4001", Spec{Scheme: "tcp", Address: "10.0.0.7:4001"}},
		{"tcp://[::1]:4001", Spec{Scheme: "tcp", Address: "[::1]:4001"}},
		{"tcp-listen://:4002?streams=per-client&max-clients=4", Spec{Scheme: "tcp-listen", Address: "127.0.0.1:4002", PerClient: true, MaxClients: 4}},
		{"udp://127.0.0.1:4003?format=binary", Spec{Scheme: "udp", Address: "127.0.0.1:4003", Format: FormatBinary}},
		{"file:///data/bench%202.csv?pace=realtime&speed=4", Spec{Scheme: "file", Address: "/data/bench 2.csv", Realtime: true, Speed: 4}},
		{"file://runs/r7.csv?rate=250&columns=pressure%5BhPa%5D,flow%5BL%2Fs%5D", Spec{Scheme: "file", Address: "runs/r7.csv", RateHz: 250, Columns: "pressure[hPa],flow[L/s]"}},
		{"stdin", Spec{Scheme: "stdin"}},
		{"-", Spec{Scheme: "stdin"}},
		{"stdin?format=binary&rate=100", Spec{Scheme: "stdin", Format: FormatBinary, RateHz: 100}},
		{"nats:trapline.samples.*", Spec{Scheme: "nats", Address: "trapline.samples.*"}},
		{"nats://site2.samples.bed-1?format=text", Spec{Scheme: "nats", Address: "site2.samples.bed-1", Format: FormatText}},
	}
	for _, tc := range tests {
		t.Run(tc.raw, func(t *testing.T) {
			got, err := ParseURL(tc.raw)
			if err != nil {
				t.Fatal(err)
			}
			w := tc.want
			if w.Baud == 0 {
				w.Baud = 115200
			}
			if w.Speed == 0 {
				w.Speed = 1
			}
			if w.MaxClients == 0 {
				w.MaxClients = 16
			}
			if got != w {
				t.Fatalf("got %+v\nwant %+v", got, w)
			}
			// The canonical form parses back to the same spec.
			again, err := ParseURL(got.String())
			if err != nil || again != got {
				t.Fatalf("%q parses to %+v, %v", got.String(), again, err)
			}
		})
	}
}

func TestParseURLErrors(t *testing.T) {
	tests := []struct{ raw, msg string }{
		{"tpc://host:1", `unknown scheme "tpc" (want serial, tcp, tcp-listen, udp, file, stdin, nats)`},
		{"data.csv", `has no scheme`},
		{"", "empty source"},
		{"serial://", "serial needs a path"},
		{"serial:///dev/ttyUSB0?buad=9600", `unknown parameter "buad" for serial (want format, rate, stream, columns, baud)`},
		{"serial:///dev/ttyUSB0?baud=fast", `baud "fast"`},
		{"tcp://host", "want host:port"},
		{"tcp://host:0", "want 1 to 65535"},
		{"tcp://:4001", "want host:port"},
		{"udp://127.0.0.1:70000", "want 1 to 65535"},
		{"file:///x?pace=slow", `pace "slow": want realtime or max`},
		{"file:///x?format=xml", `format "xml": want text or binary`},
		{"file:///x?format=", `format "": want text or binary`},
		{"file:///x?rate=-5", `rate "-5"`},
		{"file:///x?stream=bed.1", `stream "bed.1"`},
		{"file:///x?columns=time,pressure", "columns"},
		{"file:///x?rate=1&rate=2", "given 2 times"},
		{"stdin://somewhere", "stdin takes no address"},
		{"nats:", "nats needs a subject"},
		{"nats:a..b", "is not valid"},
		{"nats:a.>.b", "is not valid"},
		{"tcp-listen://:1?streams=each", `streams "each"`},
	}
	for _, tc := range tests {
		t.Run(tc.raw, func(t *testing.T) {
			_, err := ParseURL(tc.raw)
			if err == nil || !strings.Contains(err.Error(), tc.msg) || !errors.Is(err, ErrBadURL) {
				t.Fatalf("error %v, want one containing %q", err, tc.msg)
			}
		})
	}
}

func FuzzParseURL(f *testing.F) {
	b, err := os.ReadFile(filepath.Join("testdata", "urls.txt"))
	if err != nil {
		f.Fatal(err)
	}
	for line := range strings.Lines(string(b)) {
		if line = strings.TrimSpace(line); line != "" && line[0] != '#' {
			f.Add(line)
		}
	}
	f.Fuzz(func(t *testing.T, raw string) {
		s, err := ParseURL(raw)
		if err != nil {
			if !errors.Is(err, ErrBadURL) {
				t.Fatalf("error %v does not wrap ErrBadURL", err)
			}
			return
		}
		again, err := ParseURL(s.String())
		if err != nil || again != s {
			t.Fatalf("%q → %+v → %q → %+v, %v", raw, s, s.String(), again, err)
		}
	})
}
