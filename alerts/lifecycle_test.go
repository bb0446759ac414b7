package alerts

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"trapline/analyze"
)

var epoch = time.Date(2026, 12, 1, 10, 0, 0, 0, time.UTC)

// step is one input to the lifecycle: a finding at stream time t (wall time
// epoch + t unless wallS is set), or an acknowledgement of the current id
// (ack) or of a given id (ackID). want lists the expected events as
// "state/priority", with " new" when the event carries a new id and
// " supersedes" when it names the previous id in Supersedes.
type step struct {
	t       float64
	wallS   float64
	present bool
	sev     analyze.Severity
	ack     bool
	ackID   string
	wantErr bool
	want    []string
}

func finding(t float64, present bool, sev analyze.Severity) analyze.Finding {
	f := analyze.Finding{Condition: analyze.CondAirTrapping, Class: analyze.Physiological, Present: present,
		Severity: sev, TimeS: t, BreathSeq: int(t), Evidence: map[string]float64{"peepi_cmh2o": 4.7},
		Message: fmt.Sprintf("finding at %g s", t)}
	if present {
		f.Predict = map[string]float64{"te_s_for_trapped_below_50ml": 3.85}
	}
	return f
}

func p(t float64, sev analyze.Severity, want ...string) step {
	return step{t: t, present: true, sev: sev, want: want}
}
func a(t float64, want ...string) step { return step{t: t, want: want} }

const (
	lo  = analyze.SeverityLow
	med = analyze.SeverityMedium
	hi  = analyze.SeverityHigh
)

func TestLifecycleTransitions(t *testing.T) {
	tests := []struct {
		name  string
		cfg   func(*ConditionConfig)
		steps []step
	}{
		{"inactive to pending and back without an event", func(c *ConditionConfig) { c.DelayBreaths = 2 }, []step{
			p(0, lo), a(1), p(2, lo), p(3, lo), a(4),
		}},
		{"delay in breaths, raise, clear after hysteresis", func(c *ConditionConfig) { c.DelayBreaths = 2; c.ClearBreaths = 3 }, []step{
			p(0, lo), p(1, lo), p(2, lo, "raised/low new"),
			a(3), a(4), p(5, lo), // absence interrupted: the hysteresis count restarts
			a(6), a(7), a(8, "cleared/low"),
			p(9, lo), p(10, lo), p(11, lo, "raised/low new"), // a new raise gets a new id
		}},
		{"delay in seconds", func(c *ConditionConfig) { c.DelayS = 5 }, []step{
			p(0, lo), p(2, lo), p(4, lo), p(6, lo, "raised/low new"),
		}},
		{"clearing needs both breaths and seconds", func(c *ConditionConfig) { c.ClearBreaths = 2; c.ClearS = 10 }, []step{
			p(0, med, "raised/medium new"), a(1), a(2), a(5), a(11, "cleared/medium"),
		}},
		{"worsening escalates, a second escalation re-raises", nil, []step{
			p(0, lo, "raised/low new"), p(1, med, "escalated/medium"), p(2, med), p(3, lo),
			p(4, hi, "raised/high new supersedes"), a(5), a(6), a(7, "cleared/high"),
		}},
		{"persistence escalates when unacknowledged", func(c *ConditionConfig) { c.EscalateAfterS = 10 }, []step{
			p(0, lo, "raised/low new"), p(5, lo), p(10, lo, "escalated/medium"), p(15, lo),
			p(20, lo, "raised/high new supersedes"), p(40, lo),
		}},
		{"acknowledged alarm does not escalate by persistence", func(c *ConditionConfig) { c.EscalateAfterS = 10; c.AckExpiryS = 0 }, []step{
			p(0, lo, "raised/low new"), {t: 1, ack: true, want: []string{"acknowledged/low"}}, p(30, lo), p(60, lo),
			a(61), a(62), a(63, "cleared/low"),
		}},
		{"acknowledgement expires and the alarm is announced again", func(c *ConditionConfig) { c.AckExpiryS = 60 }, []step{
			p(0, med, "raised/medium new"), {t: 10, ack: true, want: []string{"acknowledged/medium"}},
			p(20, med), p(69, med), p(70, med, "raised/medium new supersedes"),
			{t: 71, ack: true, want: []string{"acknowledged/medium"}}, a(72), a(73), a(74, "cleared/medium"),
		}},
		{"ack expiry runs on the wall clock", func(c *ConditionConfig) { c.AckExpiryS = 60 }, []step{
			p(0, med, "raised/medium new"), {t: 1, ack: true, want: []string{"acknowledged/medium"}},
			{t: 2, wallS: 62, present: true, sev: med, want: []string{"raised/medium new supersedes"}},
		}},
		{"worsening after acknowledgement re-raises", nil, []step{
			p(0, lo, "raised/low new"), {t: 1, ack: true, want: []string{"acknowledged/low"}},
			p(2, med, "raised/medium new supersedes"),
		}},
		{"acknowledged then cleared keeps the id", nil, []step{
			p(0, lo, "raised/low new"), {t: 1, ack: true, want: []string{"acknowledged/low"}},
			{t: 2, ack: true}, // a second ack: no event, no error
			a(3), a(4), a(5, "cleared/low"),
		}},
		{"latching holds until acknowledged", func(c *ConditionConfig) { c.Latching = true }, []step{
			p(0, med, "raised/medium new"), a(1), a(2), a(3), a(10), // latched: no event
			p(11, med), a(12), a(13), a(14), // present again, then latched again
			{t: 15, ack: true, want: []string{"acknowledged/medium", "cleared/medium"}},
			{t: 16, ack: true, wantErr: true}, // the id is gone
		}},
		{"latching alarm acknowledged while present clears normally", func(c *ConditionConfig) { c.Latching = true }, []step{
			p(0, lo, "raised/low new"), {t: 1, ack: true, want: []string{"acknowledged/low"}},
			a(2), a(3), a(4, "cleared/low"),
		}},
		{"unknown and stale ids are errors", nil, []step{
			{t: 0, ackID: "bed-7/air-trapping/1", wantErr: true},
			p(1, lo, "raised/low new"), a(2), a(3), a(4, "cleared/low"),
			{t: 5, ack: true, wantErr: true},
		}},
		{"fixed priority ignores severity", func(c *ConditionConfig) { c.Priority = "medium" }, []step{
			p(0, hi, "raised/medium new"), p(1, hi), p(2, lo),
		}},
		{"disabled condition never raises", func(c *ConditionConfig) { c.Enabled = false }, []step{
			p(0, hi), p(1, hi), p(2, hi),
		}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg := DefaultLifecycleConfig()
			cfg.Default.EscalateAfterS = 0
			cfg.Default.AckExpiryS = 0
			if tt.cfg != nil {
				tt.cfg(&cfg.Default)
			}
			l := NewLifecycle("bed-7", cfg)
			current := ""
			for i, s := range tt.steps {
				wall := epoch.Add(time.Duration(s.t * float64(time.Second)))
				if s.wallS != 0 {
					wall = epoch.Add(time.Duration(s.wallS * float64(time.Second)))
				}
				var evs []Event
				var err error
				switch {
				case s.ack || s.ackID != "":
					id := s.ackID
					if s.ack {
						id = current
					}
					evs, err = l.Ack(id, wall)
					if s.wantErr != (err != nil) || (err != nil && !errors.Is(err, ErrUnknownAlert)) {
						t.Fatalf("step %d: ack %q error %v, want error %v", i, id, err, s.wantErr)
					}
				default:
					evs = l.Update(finding(s.t, s.present, s.sev), wall)
				}
				var got []string
				for _, e := range evs {
					d := string(e.State) + "/" + string(e.Priority)
					if e.ID != current {
						d += " new"
					}
					if e.Supersedes != "" {
						if e.Supersedes != current {
							t.Errorf("step %d: supersedes %q, want the previous id %q", i, e.Supersedes, current)
						}
						d += " supersedes"
					}
					got = append(got, d)
					checkEvent(t, e, wall)
					current = e.ID
				}
				if strings.Join(got, ", ") != strings.Join(s.want, ", ") {
					t.Fatalf("step %d (t=%g): events [%s], want [%s]", i, s.t, strings.Join(got, ", "), strings.Join(s.want, ", "))
				}
			}
		})
	}
}

// checkEvent checks the contract of docs/schema/alert.schema.json on one event.
func checkEvent(t *testing.T, e Event, wall time.Time) {
	t.Helper()
	if err := e.Validate(); err != nil {
		t.Errorf("invalid event: %v", err)
	}
	if !e.Time.Equal(wall) {
		t.Errorf("event time %v, want the wall time %v", e.Time, wall)
	}
	if !strings.HasPrefix(e.ID, "bed-7/air-trapping/") {
		t.Errorf("id %q lacks stream/condition/", e.ID)
	}
	b, err := e.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"type", "schema", "id", "stream", "condition", "class", "priority", "state", "time", "t_s", "breath_seq", "evidence", "message"} {
		if _, ok := m[k]; !ok {
			t.Errorf("event lacks %s: %s", k, b)
		}
	}
	if e.State == Raised && e.Predict["te_s_for_trapped_below_50ml"] != 3.85 {
		t.Errorf("raised event without the finding's prediction: %s", b)
	}
}

func TestLifecycleIDs(t *testing.T) {
	cfg := DefaultLifecycleConfig()
	cfg.Default.ClearBreaths = 1
	l := NewLifecycle("bed-7", cfg)
	// Two raises within the same millisecond of wall time still get
	// distinct, increasing ids.
	e1 := l.Update(finding(0, true, lo), epoch)
	l.Update(finding(1, false, lo), epoch)
	e2 := l.Update(finding(2, true, lo), epoch)
	want1 := fmt.Sprintf("bed-7/air-trapping/%d", epoch.UnixMilli())
	want2 := fmt.Sprintf("bed-7/air-trapping/%d", epoch.UnixMilli()+1)
	if len(e1) != 1 || len(e2) != 1 || e1[0].ID != want1 || e2[0].ID != want2 {
		t.Fatalf("ids %v %v, want %s then %s", e1, e2, want1, want2)
	}
	// A restarted lifecycle (fresh state) raising later in wall time cannot
	// reuse an id.
	l2 := NewLifecycle("bed-7", cfg)
	e3 := l2.Update(finding(0, true, lo), epoch.Add(time.Second))
	if e3[0].ID == want1 || e3[0].ID == want2 {
		t.Errorf("restarted lifecycle reused id %s", e3[0].ID)
	}
	// Same input, same ids: offline runs are reproducible.
	l3 := NewLifecycle("bed-7", cfg)
	if e := l3.Update(finding(0, true, lo), epoch); e[0].ID != want1 {
		t.Errorf("id %s on the same input, want %s", e[0].ID, want1)
	}
	if act := l.Active(); len(act) != 1 || act[0].ID != want2 {
		t.Errorf("active %v, want the second raise", act)
	}
}

func TestLifecyclePerConditionOverride(t *testing.T) {
	cfg := DefaultLifecycleConfig()
	l := NewLifecycle("bed-7", cfg)
	// Built-in override: the absolute limits wait for a second breath.
	f := analyze.Finding{Condition: analyze.CondHighPlateauPressure, Class: analyze.Physiological, Present: true,
		Severity: med, TimeS: 1, BreathSeq: 1, Evidence: map[string]float64{"pplat_cmh2o": 32}}
	if evs := l.Update(f, epoch); len(evs) != 0 {
		t.Fatalf("first breath over the limit raised: %v", evs)
	}
	f.TimeS, f.BreathSeq = 2, 2
	evs := l.Update(f, epoch.Add(time.Second))
	if len(evs) != 1 || evs[0].State != Raised || evs[0].Class != "physiological" || *evs[0].BreathSeq != 2 {
		t.Fatalf("second breath: %+v", evs)
	}
	// Technical findings carry no breath: breath_seq is null.
	tf := analyze.Finding{Condition: analyze.CondSignalLost, Class: analyze.Technical, Present: true,
		Severity: hi, TimeS: 3, BreathSeq: -1}
	evs = l.Update(tf, epoch.Add(2*time.Second))
	if len(evs) != 1 || evs[0].BreathSeq != nil || evs[0].Priority != Medium {
		t.Fatalf("signal-lost: %+v (want null breath_seq and the fixed medium priority)", evs)
	}
}

func TestLifecycleRejectsWhatJSONCannotCarry(t *testing.T) {
	l := NewLifecycle("bed-7", DefaultLifecycleConfig())
	f := finding(0, true, lo)
	f.TimeS = math.NaN()
	if evs := l.Update(f, epoch); len(evs) != 0 {
		t.Fatalf("finding without a time raised %v", evs)
	}
	f = finding(1, true, lo)
	f.Evidence["bad"] = math.Inf(1)
	f.Predict["worse"] = math.NaN()
	evs := l.Update(f, epoch)
	if len(evs) != 1 {
		t.Fatalf("events %v", evs)
	}
	if _, err := evs[0].Marshal(); err != nil {
		t.Fatalf("event does not encode: %v", err)
	}
	if _, ok := evs[0].Evidence["bad"]; ok || evs[0].Evidence["peepi_cmh2o"] != 4.7 {
		t.Errorf("evidence %v: want the finite values only", evs[0].Evidence)
	}
}

// TestLifecycleInvariants drives random findings and acknowledgements
// through random configurations and checks the contract that JetStream
// de-duplication relies on (docs/schema/alert.schema.json): no id carries a state twice, an
// id starts with "raised", nothing follows its "cleared" or its
// supersession, and a superseded id was the condition's current one.
func TestLifecycleInvariants(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	for run := range 200 {
		cfg := DefaultLifecycleConfig()
		c := &cfg.Default
		c.DelayBreaths = rng.IntN(3)
		c.DelayS = float64(rng.IntN(3))
		c.ClearBreaths = 1 + rng.IntN(3)
		c.ClearS = float64(rng.IntN(3))
		c.Latching = rng.IntN(2) == 0
		c.EscalateAfterS = float64(rng.IntN(3) * 10)
		c.AckExpiryS = float64(rng.IntN(3) * 15)
		l := NewLifecycle("bed-7", cfg)
		seen := map[string]bool{}      // id#state
		closed := map[string]bool{}    // ids that may get no more events
		current := map[string]string{} // condition → current id
		conds := []string{analyze.CondAirTrapping, analyze.CondHighPlateauPressure}
		check := func(step int, evs []Event) {
			for _, e := range evs {
				if err := e.Validate(); err != nil {
					t.Fatalf("run %d step %d: %v", run, step, err)
				}
				if seen[e.DedupID()] {
					t.Fatalf("run %d step %d: %s sent twice", run, step, e.DedupID())
				}
				seen[e.DedupID()] = true
				if closed[e.ID] {
					t.Fatalf("run %d step %d: %s after the id was closed", run, step, e.DedupID())
				}
				if e.State != Raised && !seen[e.ID+"#raised"] {
					t.Fatalf("run %d step %d: %s before its raise", run, step, e.DedupID())
				}
				if e.Supersedes != "" {
					if current[e.Condition] != e.Supersedes {
						t.Fatalf("run %d step %d: supersedes %s, current is %s", run, step, e.Supersedes, current[e.Condition])
					}
					closed[e.Supersedes] = true
				}
				if e.State == Raised {
					current[e.Condition] = e.ID
				}
				if e.State == Cleared {
					closed[e.ID] = true
				}
			}
		}
		for step := range 300 {
			ts := float64(step)
			wall := epoch.Add(time.Duration(step) * time.Second)
			if rng.IntN(10) == 0 {
				cond := conds[rng.IntN(len(conds))]
				evs, err := l.Ack(current[cond], wall)
				if err != nil && !errors.Is(err, ErrUnknownAlert) {
					t.Fatalf("run %d: ack error %v", run, err)
				}
				check(step, evs)
				continue
			}
			for _, cond := range conds {
				f := finding(ts, rng.IntN(3) > 0, analyze.Severity(rng.IntN(4)))
				f.Condition = cond
				check(step, l.Update(f, wall))
			}
		}
	}
}
