package daemon

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/ingest"
)

// ledgerEvent is an alarm event of stream bed-9 for the ledger tests.
func ledgerEvent(id string, st alerts.State, tS float64) alerts.Event {
	return alerts.Event{
		Type: "alert", Schema: alerts.EventSchema, ID: id, Stream: "bed-9", Condition: "air-trapping",
		Class: "physiological", Priority: alerts.Medium, State: st, TS: tS,
		Time:    time.Date(2026, 12, 3, 9, 0, 0, 0, time.UTC).Add(time.Duration(tS) * time.Second),
		Message: "air trapping", Evidence: map[string]float64{"peepi_cmh2o": 4.2},
	}
}

// TestLedgerLeavesOpenAlarms: what a run records, read back by the next
// start, leaves open exactly the alarms that were raised, escalated or
// acknowledged and neither ended nor superseded; a line cut short by a
// kill is skipped and counted.
func TestLedgerLeavesOpenAlarms(t *testing.T) {
	dir := t.TempDir()
	l, left, bad, err := openLedger(dir)
	if err != nil || len(left) != 0 || bad != 0 {
		t.Fatalf("fresh ledger: %v, %d left, %d bad", err, len(left), bad)
	}
	sup := ledgerEvent("bed-9/air-trapping/4", alerts.Raised, 40)
	sup.Supersedes = "bed-9/air-trapping/3"
	steps := []struct {
		sync bool
		ev   alerts.Event
	}{
		{true, ledgerEvent("bed-9/air-trapping/1", alerts.Raised, 10)},
		{true, ledgerEvent("bed-9/air-trapping/2", alerts.Raised, 20)},
		{false, ledgerEvent("bed-9/air-trapping/1", alerts.Cleared, 25)},
		{true, ledgerEvent("bed-9/air-trapping/3", alerts.Raised, 30)},
		{true, ledgerEvent("bed-9/air-trapping/3", alerts.Acknowledged, 31)},
		{true, sup},
		{true, ledgerEvent("bed-9/air-trapping/2", alerts.Escalated, 50)},
		{true, ledgerEvent("bed-9/air-trapping/5", alerts.Raised, 60)},
		{false, ledgerEvent("bed-9/air-trapping/5", alerts.Ended, 61)},
	}
	for _, s := range steps {
		if err := l.record(s.sync, s.ev); err != nil {
			t.Fatal(err)
		}
	}
	l.close()
	// A kill in the middle of a write leaves a partial last line.
	f, err := os.OpenFile(filepath.Join(dir, "state", ledgerFile), os.O_WRONLY|os.O_APPEND, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.WriteString(`{"type":"alert","id":"bed-9/air-trapping/6","sta`); err != nil {
		t.Fatal(err)
	}
	f.Close()

	l2, left, bad, err := openLedger(dir)
	if err != nil {
		t.Fatal(err)
	}
	defer l2.close()
	if bad != 1 {
		t.Errorf("%d unreadable lines, want 1", bad)
	}
	// Open: 2 (escalated) and 4 (superseding the acknowledged 3), oldest
	// event first.
	if len(left) != 2 || left[0].ID != "bed-9/air-trapping/4" || left[1].ID != "bed-9/air-trapping/2" ||
		left[1].State != alerts.Escalated {
		t.Fatalf("left open: %+v", left)
	}
	// The file was rewritten with only those.
	data, err := os.ReadFile(l2.path)
	if err != nil {
		t.Fatal(err)
	}
	if n := countLines(data); n != 2 {
		t.Errorf("compacted ledger has %d lines, want 2", n)
	}
}

func countLines(b []byte) int {
	n := 0
	for _, c := range b {
		if c == '\n' {
			n++
		}
	}
	return n
}

// TestLedgerCompacts: a ledger that grows past ledgerCompactBytes is
// rewritten with its open alarms only, and still reads back right.
func TestLedgerCompacts(t *testing.T) {
	dir := t.TempDir()
	l, _, _, err := openLedger(dir)
	if err != nil {
		t.Fatal(err)
	}
	// Each raise and clear is about 0.6 kB; enough of them to pass the
	// limit at least once.
	n := ledgerCompactBytes/500 + 10
	for i := range n {
		id := "bed-9/air-trapping/" + strconv.Itoa(i)
		if err := l.record(true, ledgerEvent(id, alerts.Raised, float64(i))); err != nil {
			t.Fatal(err)
		}
		if i%100 != 7 { // every hundredth stays open
			if err := l.record(false, ledgerEvent(id, alerts.Cleared, float64(i)+0.5)); err != nil {
				t.Fatal(err)
			}
		}
	}
	if l.size > ledgerCompactBytes {
		t.Errorf("ledger at %d bytes, over the %d that compact it", l.size, ledgerCompactBytes)
	}
	l.close()
	_, left, bad, err := openLedger(dir)
	if err != nil || bad != 0 {
		t.Fatal(err, bad)
	}
	want := (n + 92) / 100
	if len(left) != want {
		t.Fatalf("%d alarms left open, want %d", len(left), want)
	}
	for _, e := range left {
		if i, _ := strconv.Atoi(e.ID[len("bed-9/air-trapping/"):]); i%100 != 7 {
			t.Errorf("alarm %s left open, it was cleared", e.ID)
		}
	}
}

// TestEndedEventOfLeftAlarm: the end of an alarm left open keeps its id,
// stream, condition, priority and stream time, and says why it ended.
func TestEndedEventOfLeftAlarm(t *testing.T) {
	e := ledgerEvent("bed-9/air-trapping/3", alerts.Acknowledged, 31)
	e.Supersedes, e.Predict = "bed-9/air-trapping/2", map[string]float64{"rate_bpm": 14}
	seq := 17
	e.BreathSeq = &seq
	now := time.Date(2026, 12, 3, 10, 0, 0, 0, time.UTC)
	got := endedEvent(e, now)
	if got.ID != e.ID || got.Stream != e.Stream || got.Condition != e.Condition || got.Priority != e.Priority ||
		got.State != alerts.Ended || got.Reason != alerts.ReasonInterrupted || !got.Time.Equal(now) ||
		got.TS != 31 || got.Supersedes != "" || got.BreathSeq != nil || got.Predict != nil {
		t.Fatalf("ended event: %+v", got)
	}
	if err := got.Validate(); err != nil {
		t.Fatal(err)
	}
	if got.DedupID() == e.DedupID() {
		t.Fatal("the end has the dedup id of the event before it")
	}
}

// ledgerReader is an alert sink that, as each raise arrives, reads the
// alarm ledger as a kill at that moment would leave it.
type ledgerReader struct {
	*memSink
	path     string
	inLedger []bool // per raise: whether the ledger on disk held it
}

func (r *ledgerReader) Publish(ctx context.Context, ev alerts.Event) error {
	if ev.State == alerts.Raised {
		data, _ := os.ReadFile(r.path)
		r.mu.Lock()
		r.inLedger = append(r.inLedger, strings.Contains(string(data), `"id":"`+ev.ID+`"`))
		r.mu.Unlock()
	}
	return r.memSink.Publish(ctx, ev)
}

// TestFailedRunEndsItsAlarms: a stream without a checkpoint (a file or
// stdin) records its raise in the alarm ledger before delivering it, and
// when its source fails and the supervisor starts a new run (a new
// pipeline that reads the input from its start), the alarm the failed run
// left open is ended first, reason "monitoring interrupted". Before the
// ledger it stayed open for every subscriber.
func TestFailedRunEndsItsAlarms(t *testing.T) {
	l, _, _, err := openLedger(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	defer l.close()
	sink := &ledgerReader{memSink: newMemSink(), path: l.path}
	s := newStream(streamSpec{
		ID: "bed-12", Ledger: l,
		Open: func() (ingest.Source, streamPipeline, error) {
			return &fakeSource{period: 2 * time.Millisecond, failAfter: 8},
				&countingPipeline{stream: "bed-12", raiseAt: 5}, nil
		},
		Backoff: restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute},
	}, zerolog.Nop(), newMetrics(), sink, sink.memSink)
	runUntil(t, s, "a second run's raise", func() bool {
		sink.mu.Lock()
		defer sink.mu.Unlock()
		return len(sink.inLedger) >= 2
	})
	sink.mu.Lock()
	defer sink.mu.Unlock()
	var states []string
	for _, e := range sink.alerts {
		states = append(states, string(e.State)+" "+e.Reason)
	}
	if len(states) < 3 || states[0] != "raised " || states[1] != "ended "+alerts.ReasonInterrupted || states[2] != "raised " {
		t.Errorf("events %q, want a raise, its end as interrupted, and the next run's raise", states)
	}
	for i, ok := range sink.inLedger {
		if !ok {
			t.Errorf("raise %d was delivered before the ledger held it", i+1)
		}
	}
}

// TestLedgerRewritesStayRareWithManyOpen: when the open alarms alone
// outgrow ledgerCompactBytes (thousands of streams with an alarm each),
// the file is not rewritten on every event but each time it doubles.
func TestLedgerRewritesStayRareWithManyOpen(t *testing.T) {
	l, _, _, err := openLedger(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	defer l.close()
	const n = 8000 // about 3.5 MiB of open alarms
	for i := range n {
		if err := l.record(false, ledgerEvent("bed-9/air-trapping/"+strconv.Itoa(i), alerts.Raised, float64(i))); err != nil {
			t.Fatal(err)
		}
	}
	// One at the open, then one each time the file doubles from 1 MiB.
	if l.rewrites > 5 {
		t.Errorf("%d rewrites for %d events, want a handful", l.rewrites, n)
	}
	if len(l.open) != n {
		t.Errorf("%d open, want %d", len(l.open), n)
	}
}

// TestLedgerRemembersWhatItEnded: the ends the ledger made answer an
// acknowledgement (fate, endedOf) for the last ledgerRemember of them;
// an alarm cleared as usual is not among them.
func TestLedgerRemembersWhatItEnded(t *testing.T) {
	l, _, _, err := openLedger(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	defer l.close()
	now := time.Date(2026, 12, 3, 10, 0, 0, 0, time.UTC)
	const n = ledgerRemember + 6
	for i := range n {
		e := ledgerEvent("bed-9/air-trapping/"+strconv.Itoa(i), alerts.Raised, float64(i))
		if i == n-1 {
			e.Stream, e.ID = "bed-10", "bed-10/air-trapping/1"
		}
		if err := l.record(true, e); err != nil {
			t.Fatal(err)
		}
		if err := l.record(false, endedEvent(e, now)); err != nil {
			t.Fatal(err)
		}
	}
	if err := l.record(false, ledgerEvent("bed-9/air-trapping/x", alerts.Cleared, 1)); err != nil {
		t.Fatal(err)
	}
	want := "alert bed-9/air-trapping/6 ended at 2026-12-03T10:00:00Z: monitoring interrupted"
	if got, ok := l.fate("bed-9/air-trapping/6"); !ok || got != want {
		t.Errorf("fate = %q, %v; want %q", got, ok, want)
	}
	for _, id := range []string{"bed-9/air-trapping/5", "bed-9/air-trapping/x"} {
		if got, ok := l.fate(id); ok {
			t.Errorf("fate of %s = %q, want none (forgotten, or not ended by the ledger)", id, got)
		}
	}
	if !l.endedOf(alerts.SubjectToken("bed-10")) || !l.endedOf(alerts.SubjectToken("bed-9")) || l.endedOf(alerts.SubjectToken("bed-11")) {
		t.Error("endedOf does not tell the streams with remembered ends")
	}
	if len(l.ended) != ledgerRemember || len(l.endedOrder) != ledgerRemember {
		t.Errorf("%d ends remembered, want %d", len(l.ended), ledgerRemember)
	}
}

// FuzzLedgerRead: whatever a ledger file holds (a torn write, a disk that
// returned garbage), opening it neither fails nor panics, every alarm it
// leaves open has an id and is not in a terminal state, and the rewritten
// file reads back to the same alarms.
func FuzzLedgerRead(f *testing.F) {
	raise, _ := json.Marshal(ledgerEvent("bed-9/air-trapping/1", alerts.Raised, 10))
	clear, _ := json.Marshal(ledgerEvent("bed-9/air-trapping/1", alerts.Cleared, 20))
	f.Add(append(append(raise, '\n'), clear...))
	f.Add(raise[:len(raise)/2])
	f.Add([]byte("{}\n\n{\"id\":\"x\",\"state\":\"raised\"}\n\xff\xfe"))
	f.Fuzz(func(t *testing.T, data []byte) {
		dir := t.TempDir()
		if err := os.MkdirAll(filepath.Join(dir, "state"), 0o750); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, "state", ledgerFile), data, 0o600); err != nil {
			t.Fatal(err)
		}
		l, left, _, err := openLedger(dir)
		if err != nil {
			t.Fatalf("open: %v", err)
		}
		ids := map[string]bool{}
		for _, e := range left {
			if e.ID == "" || e.State.Terminal() {
				t.Fatalf("left open: %+v", e)
			}
			ids[e.ID] = true
		}
		l.close()
		_, again, bad, err := openLedger(dir)
		if err != nil || bad != 0 || len(again) != len(left) {
			t.Fatalf("reopened: %d left (want %d), %d bad, %v", len(again), len(left), bad, err)
		}
		for _, e := range again {
			if !ids[e.ID] {
				t.Fatalf("reopened ledger leaves %s open, the first did not", e.ID)
			}
		}
	})
}
