package cli

import (
	"bufio"
	"bytes"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"go.bug.st/serial"

	"trapline/ingest"
	"trapline/simulator"
)

// TestSimCheckCase1 runs the verb with the flags of the project reference
// §11 case 1 (VT 0.6 L, R 25, C 0.06, 24 /min, Ti 0.8 s, PEEP 5) and checks
// the samples and the ground truth against its values: Ppeak 38.50, EEF
// 11.40 L/min, Pplat 19.75, intrinsic PEEP 4.748, trapped 0.2849 L
// (Marini JJ, Crooke PS, Truwit JD, J Appl Physiol 1989;67:1081, closed
// form; pressures [derived from the linear single-compartment model, Bates
// 2009]).
func TestSimCheckCase1(t *testing.T) {
	truthPath := filepath.Join(t.TempDir(), "truth.ndjson")
	var stdout, stderr bytes.Buffer
	code := Run(t.Context(), []string{"sim", "--resistance", "25", "--compliance", "60", "--tidal-volume", "600",
		"--flow", "45", "--rate", "24", "--peep", "5", "--duration", "120s", "--speed", "max",
		"--sample-rate", "1000", "--truth", truthPath}, nil, &stdout, &stderr)
	if code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	if !strings.HasPrefix(stdout.String(), "time[s],pressure[cmH2O],flow[L/min]\n") {
		t.Fatalf("no header: %.60q", stdout.String())
	}
	var samples []ingest.Sample
	dec, err := ingest.NewTextDecoder(ingest.DecoderOptions{}, func(_ string, s ingest.Sample) { samples = append(samples, s) })
	if err != nil {
		t.Fatal(err)
	}
	if err := ingest.Decode(&stdout, dec); err != nil {
		t.Fatal(err)
	}
	if len(samples) != 120000 {
		t.Fatalf("%d samples, want 120000", len(samples))
	}
	// The last whole breath: 117.5 s to 120 s.
	peak, eef := math.Inf(-1), 0.0
	for _, s := range samples[117500:] {
		peak = math.Max(peak, s.PressureCmH2O)
	}
	eef = -samples[len(samples)-1].FlowLPS * 60
	// At 1000 Hz the last sample before a phase boundary is 1 ms short of
	// it: 25·0.75·0.001/0.06 → 0.0125 cmH2O and τ-decay 0.07 % of EEF.
	if math.Abs(peak-38.50) > 0.02 {
		t.Errorf("peak %.3f cmH2O, want 38.50", peak)
	}
	if math.Abs(eef-11.40) > 0.02 {
		t.Errorf("end-expiratory flow %.3f L/min, want 11.40", eef)
	}

	f, err := os.Open(truthPath)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var last simulator.Truth
	n := 0
	for sc := bufio.NewScanner(f); sc.Scan(); n++ {
		if err := json.Unmarshal(sc.Bytes(), &last); err != nil {
			t.Fatalf("truth line %d: %v", n+1, err)
		}
	}
	if n != 48 {
		t.Errorf("%d breaths of truth, want 48", n)
	}
	for _, c := range []struct {
		name      string
		got, want float64
		tol       float64
	}{
		{"pplat_cmh2o", last.PlateauCmH2O, 19.75, 0.005},
		{"pip_cmh2o", last.PeakCmH2O, 38.50, 0.005},
		{"peepi_cmh2o", last.PEEPiCmH2O, 4.748, 0.0005},
		{"trapped_ml", last.TrappedML, 284.9, 0.05},
		{"eef_lpm", last.EndExpFlowLPM, 11.40, 0.005},
	} {
		if math.Abs(c.got-c.want) > c.tol {
			t.Errorf("truth %s = %.4f, want %.4f", c.name, c.got, c.want)
		}
	}
}

// TestSimUsage: bad flags are usage errors (exit 2) and name the flag.
func TestSimUsage(t *testing.T) {
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--resistance", "-3"}, "resistance"},
		{[]string{"--speed", "fast"}, "--speed"},
		{[]string{"--speed", "0"}, "--speed"},
		{[]string{"--format", "xml"}, "--format"},
		{[]string{"--out", "ftp://x:1"}, "--out"},
		{[]string{"--scenario", "no-such-scenario"}, "--scenario"},
		{[]string{"--scenario", "/no/such/file.yaml"}, "--scenario"},
		{[]string{"--sample-rate", "5"}, "sample_rate_hz"},
		{[]string{"--rate", "60", "--flow", "20"}, "expiration"},
		{[]string{"--link", "/tmp/x"}, "--link"},
		{[]string{"--duration", "soon"}, "duration"},
		{[]string{"--stream", "bad id"}, "--stream"},
		{[]string{"extra"}, "unknown command"},
	} {
		t.Run(strings.Join(c.args, " "), func(t *testing.T) {
			var stdout, stderr bytes.Buffer
			code := Run(t.Context(), append([]string{"sim", "--speed", "max"}, c.args...), nil, &stdout, &stderr)
			if c.args[0] == "--speed" {
				code = Run(t.Context(), append([]string{"sim"}, c.args...), nil, &stdout, &stderr)
			}
			if code != ExitUsage {
				t.Fatalf("exit %d, want %d; stderr %s", code, ExitUsage, stderr.String())
			}
			if !strings.Contains(stderr.String(), c.want) {
				t.Errorf("stderr %q does not mention %q", stderr.String(), c.want)
			}
		})
	}
}

// TestSimScenarioAndList: --list names every shipped scenario, and a
// shipped scenario runs with its settings overridden by flags.
func TestSimScenarioAndList(t *testing.T) {
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"sim", "--list"}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	for _, name := range []string{"stable", "bronchospasm", "hyperinflation", "secretions", "stiffening", "disconnect", "noisy"} {
		if !strings.Contains(stdout.String(), name) {
			t.Errorf("--list does not name %s", name)
		}
	}
	stdout.Reset()
	code := Run(t.Context(), []string{"sim", "--scenario", "bronchospasm", "--duration", "30s", "--speed", "max",
		"--format", "binary", "--seed", "9"}, nil, &stdout, &stderr)
	if code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	var n int
	dec, err := ingest.NewBinaryDecoder(ingest.DecoderOptions{}, func(stream string, _ ingest.Sample) {
		if stream == "icu-12" {
			n++
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := ingest.Decode(&stdout, dec); err != nil {
		t.Fatal(err)
	}
	if n != 3000 {
		t.Errorf("%d binary samples of stream icu-12, want 3000", n)
	}
}

// TestSimPTY runs the verb on a pseudo-terminal behind a link, reads it with
// go.bug.st/serial as the daemon reads a serial adapter, and finds the
// slave path on stdout.
func TestSimPTY(t *testing.T) {
	link := filepath.Join(t.TempDir(), "vent")
	var stdout, stderr simSyncBuffer
	done := make(chan int, 1)
	go func() {
		done <- Run(t.Context(), []string{"sim", "--duration", "5s", "--speed", "max", "--out", "pty", "--link", link, "--decimals", "0"},
			nil, &stdout, &stderr)
	}()
	var port serial.Port
	deadline := time.Now().Add(10 * time.Second)
	for port == nil && time.Now().Before(deadline) {
		p, err := serial.Open(link, &serial.Mode{BaudRate: 115200})
		if err != nil {
			time.Sleep(5 * time.Millisecond)
			continue
		}
		port = p
	}
	if port == nil {
		t.Fatalf("no pseudo-terminal at %s; stderr %s", link, stderr.String())
	}
	defer port.Close()
	_ = port.SetReadTimeout(100 * time.Millisecond)
	var n int
	dec, err := ingest.NewTextDecoder(ingest.DecoderOptions{}, func(string, ingest.Sample) { n++ })
	if err != nil {
		t.Fatal(err)
	}
	buf := make([]byte, 4096)
	for n < 500 && time.Now().Before(deadline) {
		k, err := port.Read(buf)
		if err != nil {
			break
		}
		_, _ = dec.Write(buf[:k])
	}
	if code := <-done; code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	if n != 500 {
		t.Errorf("read %d samples, want 500", n)
	}
	target, _ := os.Readlink(link)
	if path := strings.TrimSpace(stdout.String()); !strings.HasPrefix(path, "/dev/") {
		t.Errorf("stdout %q: want the slave path (link was %q)", path, target)
	}
}

// simSyncBuffer is a bytes.Buffer shared by the verb's goroutine and the test.
type simSyncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *simSyncBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *simSyncBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}
