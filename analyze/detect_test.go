package analyze

import (
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
)

// lungModel is a passive linear single-compartment lung under constant-flow
// volume control without a pause. modelBreath fills a breath record with its
// steady-state values from the steady-state closed forms of the linear single-compartment model (docs/formulas.md) (derived from
// the equation of motion; Bates JHT, Lung Mechanics, 2009; analogous forms in
// Marini JJ, Crooke PS, Truwit JD, J Appl Physiol 1989;67:1081).
type lungModel struct {
	R, CL, VTL, RR, TiS, PEEP float64
}

func (m lungModel) breath(seq int, startS float64) Breath {
	b := NewBreath()
	period := 60 / m.RR
	te := period - m.TiS
	tau := m.R * m.CL
	x := math.Exp(-te / tau)
	vtrap := m.VTL * x / (1 - x)
	peepi := vtrap / m.CL
	flow := m.VTL / m.TiS
	b.Seq, b.StartS, b.EndS = seq, startS, startS+period
	b.TiS, b.TeS, b.RateBPM = m.TiS, te, m.RR
	b.VtiML, b.VteML = 1000*m.VTL, 1000*m.VTL
	b.PEEPCmH2O = m.PEEP
	plat := m.PEEP + peepi + m.VTL/m.CL
	b.PeakCmH2O = plat + m.R*flow
	b.PeakInspFlowLPM = 60 * flow
	b.EndExpFlowLPM = 60 * vtrap / tau
	b.TauS, b.TeOverTau = tau, te/tau
	b.RCmH2OSPerL, b.CMLPerCmH2O, b.FitR2 = m.R, 1000*m.CL, 0.999
	b.PTot0CmH2O = m.PEEP + peepi
	b.TrappedML, b.PEEPiCmH2O = 1000*vtrap, peepi
	b.TrappedEEFML, b.PEEPiEEFCmH2O = 1000*vtrap, peepi
	return b
}

// Check cases 1 and 3 of docs/formulas.md (derived values).
var (
	case1 = lungModel{R: 25, CL: 0.06, VTL: 0.6, RR: 24, TiS: 0.8, PEEP: 5}
	case3 = lungModel{R: 5, CL: 0.05, VTL: 0.5, RR: 20, TiS: 1, PEEP: 5}
)

func detNear(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

func TestLungModelMatchesReferenceCases(t *testing.T) {
	// check case 1 of docs/formulas.md (derived): V_trap 0.2849 L, intrinsic PEEP 4.748, EEF 11.40
	// L/min, Ppeak 38.50; case 3: V_trap 0.17 mL, Ppeak 17.5 (derived).
	b := case1.breath(0, 0)
	for _, c := range []struct {
		name      string
		got, want float64
		tol       float64
	}{
		{"case1 trapped_ml", b.TrappedML, 284.9, 0.1},
		{"case1 peepi", b.PEEPiCmH2O, 4.748, 0.001},
		{"case1 eef_lpm", b.EndExpFlowLPM, 11.40, 0.01},
		{"case1 peak", b.PeakCmH2O, 38.50, 0.01},
		{"case3 trapped_ml", case3.breath(0, 0).TrappedML, 0.17, 0.01},
		{"case3 peak", case3.breath(0, 0).PeakCmH2O, 17.5, 0.01},
	} {
		if !detNear(c.got, c.want, c.tol) {
			t.Errorf("%s = %.4f, want %.4f", c.name, c.got, c.want)
		}
	}
}

func TestTheilSenIgnoresOutliers(t *testing.T) {
	// With fewer outliers than the estimator's breakdown point (29.3 %;
	// Sen PK, J Am Stat Assoc 1968;63:1379), the median of pairwise slopes
	// of y = 2x + 1 is exactly 2: 105 of the 190 pairs are exact.
	var xs, ys []float64
	for i := range 20 {
		xs = append(xs, float64(i))
		y := 2*float64(i) + 1
		if i%4 == 1 {
			y = 1000 // 5 of 20 outliers
		}
		ys = append(ys, y)
	}
	got, _ := detTheilSen(xs, ys, nil)
	if got != 2 {
		t.Errorf("Theil–Sen slope %v, want 2", got)
	}
}

// TestTheilSenBandIsExact checks that the slope selected within a band
// equals the median of all pairwise slopes sorted by the standard library
// (the estimator's definition: Sen PK, J Am Stat Assoc 1968;63:1379), on
// windows with trends, outliers, ties of values and repeated times, and
// that the band is what usually finds it.
func TestTheilSenBandIsExact(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 9))
	banded := 0
	const trials = 400
	for trial := range trials {
		n := 23 + rng.IntN(74) // 253 to 4,560 pairs
		xs, ys := make([]float64, n), make([]float64, n)
		x := 0.0
		for i := range n {
			x += (2 + rng.Float64()) / 60 // breath times, in minutes
			xs[i] = x
			ys[i] = 20 + 0.1*float64(trial%7-3)*float64(i) + rng.NormFloat64()
			switch {
			case trial%5 == 1:
				ys[i] = math.Round(ys[i]) // ties of slopes
			case trial%5 == 2 && rng.IntN(5) == 0:
				ys[i] = 1000 // outliers
			case trial%5 == 3 && i > 0 && rng.IntN(10) == 0:
				xs[i] = xs[i-1] // a repeated time: the whole selection
			}
		}
		var all []float64
		for i := range n {
			for j := i + 1; j < n; j++ {
				if dx := xs[j] - xs[i]; dx != 0 {
					all = append(all, (ys[j]-ys[i])/dx)
				}
			}
		}
		slices.Sort(all)
		m := len(all)
		want := (all[(m-1)/2] + all[m/2]) / 2
		got, _ := detTheilSen(xs, ys, nil)
		if got != want {
			t.Fatalf("trial %d (n %d): slope %v, want %v", trial, n, got, want)
		}
		buf := make([]float64, n*(n-1)/2)
		if s, ok := theilSenBand(xs, ys, buf); ok {
			banded++
			if s != want {
				t.Fatalf("trial %d: band slope %v, want %v", trial, s, want)
			}
		}
	}
	// Four-fifths of the windows have increasing times; of those the band
	// should miss only about one in ten thousand (four standard deviations).
	if banded < trials*4/5-4 {
		t.Errorf("the band found the median in %d of %d windows", banded, trials)
	}
}

func TestAirTrappingOnReferenceCases(t *testing.T) {
	cfg := DefaultDetectorConfig().AirTrapping
	t.Run("case 1 traps", func(t *testing.T) {
		d := NewAirTrapping(cfg)
		var f Finding
		for i := range 10 {
			b := case1.breath(i, float64(i)*2.5)
			fs := d.Breath(&b, nil)
			if len(fs) != 1 {
				t.Fatalf("breath %d: %d findings, want 1", i, len(fs))
			}
			f = fs[0]
			// N of M = 4 of 6: present from the 4th positive breath.
			if want := i >= cfg.N-1; f.Present != want {
				t.Fatalf("breath %d: present %v, want %v (%s)", i, f.Present, want, f.Message)
			}
		}
		// Intrinsic PEEP 4.75 < 5 and trapped 285 mL < 300: low severity.
		if f.Severity != SeverityLow {
			t.Errorf("severity %v, want low", f.Severity)
		}
		if !detNear(f.Evidence["peepi_cmh2o"], 4.75, 0.01) || !detNear(f.Evidence["trapped_ml"], 284.9, 0.1) {
			t.Errorf("evidence %v", f.Evidence)
		}
		// τ·ln(1 + VT/50 mL) = 1.5·ln 13 = 3.85 s; rate 60/(0.8 + 3.85).
		if got := f.Predict["te_s_for_trapped_below_50ml"]; !detNear(got, 3.85, 0.005) {
			t.Errorf("predict te %v, want 3.85", got)
		}
		if got := f.Predict["rr_bpm_for_trapped_below_50ml"]; !detNear(got, 12.9, 0.05) {
			t.Errorf("predict rr %v, want 12.9", got)
		}
		if !strings.Contains(f.Message, "4 of the last 6") && !strings.Contains(f.Message, "6 of the last 6") {
			t.Errorf("message %q", f.Message)
		}
	})
	t.Run("case 3 never alarms", func(t *testing.T) {
		d := NewAirTrapping(cfg)
		for i := range 200 {
			b := case3.breath(i, float64(i)*3)
			if f := d.Breath(&b, nil)[0]; f.Present {
				t.Fatalf("breath %d present: %s", i, f.Message)
			}
		}
	})
	t.Run("severity grading", func(t *testing.T) {
		// Same patient at 30 and 40 breaths/min: Te 1.2 s gives V_trap
		// 0.6·e^-0.8/(1 − e^-0.8) = 0.4896 L (medium); Te 0.7 s gives 1.0
		// L, intrinsic PEEP 16.7 cmH2O (high) — steady-state closed form of the linear single-compartment model, docs/formulas.md.
		for _, c := range []struct {
			rr   float64
			want Severity
		}{{30, SeverityMedium}, {40, SeverityHigh}} {
			m := case1
			m.RR = c.rr
			d := NewAirTrapping(cfg)
			var f Finding
			for i := range 6 {
				b := m.breath(i, float64(i)*2)
				f = d.Breath(&b, nil)[0]
			}
			if !f.Present || f.Severity != c.want {
				t.Errorf("rr %g: present %v severity %v, want %v (evidence %v)", c.rr, f.Present, f.Severity, c.want, f.Evidence)
			}
		}
	})
}

func TestAirTrappingCriteria(t *testing.T) {
	cfg := DefaultDetectorConfig().AirTrapping
	base := case1.breath(0, 0) // every criterion holds
	tests := []struct {
		name   string
		change func(*Breath)
		want   bool
	}{
		{"all criteria", func(*Breath) {}, true},
		// The criterion is scale-free: a small end-expiratory flow does not
		// veto an intrinsic PEEP estimate (at R 60 cmH2O·s/L, 1 L/min is
		// 1 cmH2O; derived from PEEPi ≈ R·|EEF|).
		{"small end-expiratory flow", func(b *Breath) { b.EndExpFlowLPM = 1 }, true},
		{"eef unknown", func(b *Breath) { b.EndExpFlowLPM = math.NaN() }, true},
		{"small magnitude", func(b *Breath) { b.PEEPiCmH2O, b.TrappedML = 1, 30 }, false},
		{"trapped volume with a small pressure", func(b *Breath) { b.PEEPiCmH2O = 1 }, false},
		{"trapped volume without a pressure", func(b *Breath) {
			b.PEEPiCmH2O, b.PEEPiEEFCmH2O, b.PEEPiFitCmH2O = math.NaN(), math.NaN(), math.NaN()
		}, true},
		{"intrinsic PEEP alone", func(b *Breath) { b.TrappedML = 30 }, true},
		{"fallback to flow estimate", func(b *Breath) { b.PEEPiCmH2O, b.TrappedML = math.NaN(), math.NaN() }, true},
		{"long expiration", func(b *Breath) { b.TeOverTau = 3.5 }, false},
		{"te/tau unknown", func(b *Breath) { b.TeOverTau, b.TauS = math.NaN(), math.NaN() }, true},
		{"artifact", func(b *Breath) { b.Flags = []string{"artifact"} }, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			d := NewAirTrapping(cfg)
			var f Finding
			for i := range cfg.M {
				b := base
				b.Seq, b.EndS = i, float64(i)
				tt.change(&b)
				f = d.Breath(&b, nil)[0]
			}
			if f.Present != tt.want {
				t.Errorf("present %v, want %v: %s %v", f.Present, tt.want, f.Message, f.Evidence)
			}
		})
	}
}

func TestAirTrappingBuildUp(t *testing.T) {
	// Mass balance: the end-expiratory volume of a breath exceeds that of
	// the one before by its inspired minus expired volume (derived). A
	// patient whose trapped volume grows by 12 mL a breath, with estimates
	// lagging under the magnitude thresholds (intrinsic PEEP 1.0 → 1.72
	// cmH2O, trapped 80 → 143 mL), is caught by the build-up rule at half the
	// thresholds; the same estimates without the volume balance (a flat
	// end-expiratory volume, so the rising estimates are not confirmed) are
	// not.
	cfg := DefaultDetectorConfig().AirTrapping
	for _, tt := range []struct {
		name      string
		balanceML float64
		want      bool
	}{{"growing", 12, true}, {"balance zero", 0, false}} {
		t.Run(tt.name, func(t *testing.T) {
			d := NewAirTrapping(cfg)
			var f Finding
			for n := range 10 {
				b := case1.breath(n, float64(n)*2.5)
				b.VteML = b.VtiML - tt.balanceML
				b.PEEPiCmH2O = 1.0 + 0.08*float64(n)
				b.TrappedML = 80 + 7*float64(n)
				f = d.Breath(&b, nil)[0]
			}
			if f.Present != tt.want {
				t.Errorf("present %v, want %v: %s %v", f.Present, tt.want, f.Message, f.Evidence)
			}
			if tt.want && (f.Evidence["building_up"] != 1 || f.Evidence["balance_ml"] != 72) {
				t.Errorf("evidence %v: want building_up 1 and a balance of 6 × 12 mL", f.Evidence)
			}
		})
	}
}

func TestAirTrappingNOfM(t *testing.T) {
	cfg := DefaultDetectorConfig().AirTrapping // 4 of 6 to raise, 2 of 6 to stay
	d := NewAirTrapping(cfg)
	present := false
	pos := case1.breath(0, 0)
	neg := case3.breath(0, 0)
	pattern := []bool{true, false, true, false, true, false, true, false, true, true, false, false, false, false, false, true, true}
	// Count of positives in the last 6 (or fewer) breaths decides.
	for i, p := range pattern {
		b := neg
		if p {
			b = pos
		}
		b.Seq = i
		f := d.Breath(&b, nil)[0]
		count := 0
		for j := max(0, i-5); j <= i; j++ {
			if pattern[j] {
				count++
			}
		}
		present = count >= 4 || (present && count >= 2)
		if f.Present != present {
			t.Errorf("breath %d: present %v, want %v (%d positives)", i, f.Present, present, count)
		}
	}
}

// risingRun feeds breaths every 3 s whose peak pressure follows peak(t) and
// plateau plat(t), with noise of sd cmH2O, and returns the time of the first
// present finding (NaN if none) and the last present finding.
func risingRun(t *testing.T, durS float64, peak, plat func(float64) float64, sd float64, seed uint64) (float64, Finding) {
	t.Helper()
	d := NewRisingPeak(DefaultDetectorConfig().RisingPeak)
	rng := rand.New(rand.NewPCG(seed, 1))
	first := math.NaN()
	var last Finding
	for i := 0; float64(i)*3 < durS; i++ {
		ts := float64(i) * 3
		b := NewBreath()
		b.Seq, b.StartS, b.EndS = i, ts, ts+3
		b.PeakCmH2O = peak(ts) + sd*rng.NormFloat64()
		b.PlateauCmH2O = plat(ts) + sd*rng.NormFloat64()
		f := d.Breath(&b, nil)[0]
		if f.Present {
			if math.IsNaN(first) {
				first = ts
			}
			last = f
		}
	}
	return first, last
}

func TestRisingPeak(t *testing.T) {
	// A 25 % rise of a 25 cmH2O peak spread over 10 minutes, starting at
	// 10 min: the acceptance bound is detection within 3 minutes.
	const start = 600.0
	ramp := func(base, rise float64) func(float64) float64 {
		return func(ts float64) float64 {
			return base + rise*min(max(ts-start, 0), 600)/600
		}
	}
	flat := func(v float64) func(float64) float64 { return func(float64) float64 { return v } }
	t.Run("resistive", func(t *testing.T) {
		// Peak rises, plateau does not: Ppeak − Pplat = R·V' widens.
		first, f := risingRun(t, 1500, ramp(25, 6.25), flat(18), 0.3, 1)
		if math.IsNaN(first) || first-start > 180 || first < start {
			t.Fatalf("first present at %v s, want within 180 s after %v s", first, start)
		}
		t.Logf("resistive rise detected %.0f s after its start", first-start)
		if f.Evidence["resistive_fraction"] < 0.5 || !strings.Contains(f.Message, "resistive") {
			t.Errorf("want resistive, got %s %v", f.Message, f.Evidence)
		}
	})
	t.Run("elastic", func(t *testing.T) {
		// Peak and plateau rise together: VT/C grows, compliance falls.
		first, f := risingRun(t, 1500, ramp(25, 6.25), ramp(18, 6.25), 0.3, 2)
		if math.IsNaN(first) || first-start > 180 || first < start {
			t.Fatalf("first present at %v s, want within 180 s after %v s", first, start)
		}
		t.Logf("elastic rise detected %.0f s after its start", first-start)
		if f.Evidence["resistive_fraction"] >= 0.5 || !strings.Contains(f.Message, "elastic") {
			t.Errorf("want elastic, got %s %v", f.Message, f.Evidence)
		}
	})
	t.Run("stable", func(t *testing.T) {
		dur := 12 * 3600.0
		if testing.Short() {
			dur = 3600
		}
		for seed := range uint64(3) {
			if first, f := risingRun(t, dur, flat(25), flat(18), 0.3, seed+10); !math.IsNaN(first) {
				t.Errorf("seed %d: present at %v s on a stable peak: %s", seed, first, f.Message)
			}
		}
	})
}

func TestLimits(t *testing.T) {
	cfg := DefaultDetectorConfig().Limits
	find := func(fs []Finding, cond string) Finding {
		for _, f := range fs {
			if f.Condition == cond {
				return f
			}
		}
		t.Fatalf("no finding for %s in %v", cond, fs)
		return Finding{}
	}
	t.Run("case 1 within limits", func(t *testing.T) {
		// Ppeak 38.5, Pplat 19.75 (estimated from the fit, no pause),
		// driving pressure VT/C = 10 cmH2O (check case 1 of docs/formulas.md (derived)).
		d := NewLimits(cfg)
		b := case1.breath(0, 0)
		fs := d.Breath(&b, nil)
		if len(fs) != 3 {
			t.Fatalf("%d findings, want 3", len(fs))
		}
		for _, f := range fs {
			if f.Present {
				t.Errorf("%s present: %s", f.Condition, f.Message)
			}
		}
		if got := find(fs, CondHighPlateauPressure).Evidence["pplat_cmh2o"]; !detNear(got, 19.75, 0.01) {
			t.Errorf("estimated plateau %v, want 19.75", got)
		}
		if got := find(fs, CondHighDrivingPressure).Evidence["driving_cmh2o"]; !detNear(got, 10, 0.01) {
			t.Errorf("driving pressure %v, want VT/C = 10", got)
		}
	})
	t.Run("plateau with hysteresis", func(t *testing.T) {
		// ARDS Network limit 30 cmH2O, hysteresis 1: 31 raises, 29.5 holds,
		// 28.9 clears; 36 is high (limit + 5).
		d := NewLimits(cfg)
		steps := []struct {
			plat    float64
			present bool
			sev     Severity
		}{{29, false, SeverityNone}, {31, true, SeverityMedium}, {29.5, true, SeverityMedium}, {28.9, false, SeverityNone}, {36, true, SeverityHigh}}
		for i, s := range steps {
			b := case1.breath(i, float64(i))
			b.PlateauCmH2O, b.PEEPCmH2O, b.PEEPiCmH2O = s.plat, 20, 0
			f := find(d.Breath(&b, nil), CondHighPlateauPressure)
			if f.Present != s.present || f.Severity != s.sev {
				t.Errorf("plateau %g: present %v severity %v, want %v %v", s.plat, f.Present, f.Severity, s.present, s.sev)
			}
		}
	})
	t.Run("stiff lung", func(t *testing.T) {
		// C 25 mL/cmH2O, VT 0.6 L: driving pressure VT/C = 24 cmH2O,
		// above 15 + 5: high (Amato 2015 limit, common practice).
		m := case1
		m.CL = 0.025
		d := NewLimits(cfg)
		b := m.breath(0, 0)
		f := find(d.Breath(&b, nil), CondHighDrivingPressure)
		if !f.Present || f.Severity != SeverityHigh || f.Evidence["estimated"] != 1 {
			t.Errorf("driving: %v %v %s %v", f.Present, f.Severity, f.Message, f.Evidence)
		}
		if !detNear(f.Evidence["driving_cmh2o"], 24, 0.01) {
			t.Errorf("driving %v, want 24", f.Evidence["driving_cmh2o"])
		}
	})
	t.Run("no plateau on a bound", func(t *testing.T) {
		// A slow end's intrinsic PEEP is only a bound, so is the total
		// PEEP under an estimated plateau: the plateau is unknown and keeps
		// its verdict; the driving pressure, VT/C = 10 cmH2O, does not
		// depend on it (case 1 of docs/formulas.md, derived).
		d := NewLimits(cfg)
		b := case1.breath(0, 0)
		b.PEEPiCmH2O = 17 // would put the estimated plateau at 5 + 17 + 10 = 32, over the limit
		b.Flags = append(b.Flags, FlagPEEPiBound)
		fs := d.Breath(&b, nil)
		if f := find(fs, CondHighPlateauPressure); f.Present || !math.IsNaN(nanIfMissing(f.Evidence, "pplat_cmh2o")) {
			t.Errorf("plateau from a bound: present %v, %s, %v", f.Present, f.Message, f.Evidence)
		}
		if got := find(fs, CondHighDrivingPressure).Evidence["driving_cmh2o"]; !detNear(got, 10, 0.01) {
			t.Errorf("driving pressure %v, want VT/C = 10", got)
		}
	})
	t.Run("no estimate when disabled", func(t *testing.T) {
		c := cfg
		c.EstimateWithoutPause = false
		d := NewLimits(c)
		b := case1.breath(0, 0)
		f := find(d.Breath(&b, nil), CondHighPlateauPressure)
		if _, ok := f.Evidence["pplat_cmh2o"]; ok || f.Present {
			t.Errorf("plateau reported without a pause: %v", f.Evidence)
		}
	})
}

// nanIfMissing returns ev[key], NaN when the key is absent.
func nanIfMissing(ev map[string]float64, key string) float64 {
	if v, ok := ev[key]; ok {
		return v
	}
	return math.NaN()
}

func TestDetMedianMatchesSort(t *testing.T) {
	// Reference: the middle of the sorted slice (sort from the standard
	// library), on random lengths including even ones and ties.
	rng := rand.New(rand.NewPCG(7, 7))
	for n := 1; n < 200; n++ {
		vs := make([]float64, n)
		for i := range vs {
			vs[i] = math.Round(rng.NormFloat64() * 5) // ties on purpose
		}
		ref := append([]float64(nil), vs...)
		slices.Sort(ref)
		want := ref[n/2]
		if n%2 == 0 {
			want = (ref[n/2-1] + ref[n/2]) / 2
		}
		if got := detMedian(vs); got != want {
			t.Fatalf("n=%d: median %v, want %v", n, got, want)
		}
	}
}

// TestDetSelectMatchesSort checks the selection against the sorted slice
// (sort from the standard library) at every rank, on short and long
// slices (up to the 4,560 slopes of a full trend window), on inputs with
// ties, already sorted, reversed and constant, the orders a trend and a
// flat window produce.
func TestDetSelectMatchesSort(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 3))
	for _, n := range []int{1, 2, 3, 17, 256, 1500, 4560} {
		for _, shape := range []string{"random", "ties", "sorted", "reversed", "constant"} {
			vs := make([]float64, n)
			for i := range vs {
				switch shape {
				case "random":
					vs[i] = rng.NormFloat64()
				case "ties":
					vs[i] = math.Round(rng.NormFloat64() * 3)
				case "sorted":
					vs[i] = float64(i) * 0.5
				case "reversed":
					vs[i] = float64(n - i)
				case "constant":
					vs[i] = 2.5
				}
			}
			ref := append([]float64(nil), vs...)
			slices.Sort(ref)
			step := max(1, n/97) // every rank on short slices, about a hundred on long ones
			for k := 0; k < n; k += step {
				w := append([]float64(nil), vs...)
				if got := detSelect(w, k); got != ref[k] {
					t.Fatalf("%s n=%d k=%d: %v, want %v", shape, n, k, got, ref[k])
				}
				for i := range k {
					if w[i] > w[k] {
						t.Fatalf("%s n=%d k=%d: w[%d]=%v above the k-th %v", shape, n, k, i, w[i], w[k])
					}
				}
				for i := k + 1; i < n; i++ {
					if w[i] < w[k] {
						t.Fatalf("%s n=%d k=%d: w[%d]=%v below the k-th %v", shape, n, k, i, w[i], w[k])
					}
				}
			}
		}
	}
}

// TestDetectorsSurviveHostileBreaths feeds breaths whose values are drawn
// from NaN, ±Inf, zero, negatives and huge numbers: no panic, and every
// number a finding carries is finite, because JSON has no NaN or Inf and an
// alert that cannot be encoded could not be delivered.
func TestDetectorsSurviveHostileBreaths(t *testing.T) {
	specials := []float64{math.NaN(), math.Inf(1), math.Inf(-1), 0, -1, 1e308, -1e308, 5e-324, 3, 600}
	rng := rand.New(rand.NewPCG(1, 2))
	d := NewDetectors(DefaultDetectorConfig())
	base := case1.breath(0, 0)
	for i := range 20000 {
		b := base
		b.Seq = i
		ts := float64(i) * 2.5
		if rng.IntN(50) == 0 {
			ts = specials[rng.IntN(len(specials))]
		}
		b.StartS, b.EndS = ts, ts+2.5
		for _, p := range []*float64{&b.TiS, &b.TeS, &b.VtiML, &b.VteML, &b.PeakCmH2O, &b.PlateauCmH2O, &b.PEEPCmH2O,
			&b.PeakInspFlowLPM, &b.EndExpFlowLPM, &b.TauS, &b.TeOverTau, &b.RCmH2OSPerL, &b.CMLPerCmH2O, &b.FitR2,
			&b.TrappedML, &b.PEEPiCmH2O, &b.TrappedEEFML, &b.PEEPiEEFCmH2O, &b.PEEPiFitCmH2O} {
			if rng.IntN(4) == 0 {
				*p = specials[rng.IntN(len(specials))]
			}
		}
		for _, f := range d.Breath(&b, nil) {
			for k, v := range f.Evidence {
				if math.IsNaN(v) || math.IsInf(v, 0) {
					t.Fatalf("breath %d: %s evidence %s = %v", i, f.Condition, k, v)
				}
			}
			for k, v := range f.Predict {
				if math.IsNaN(v) || math.IsInf(v, 0) {
					t.Fatalf("breath %d: %s predict %s = %v", i, f.Condition, k, v)
				}
			}
		}
	}
}

// BenchmarkDetectorsBreath measures all breath detectors on one breath with
// full windows (the rising-peak window holds 50 breaths at 20 /min).
func BenchmarkDetectorsBreath(b *testing.B) {
	d := NewDetectors(DefaultDetectorConfig())
	m := case1
	m.RR = 20
	br := m.breath(0, 0)
	var fs []Finding
	for i := range 100 {
		br.Seq, br.StartS, br.EndS = i, float64(i)*3, float64(i+1)*3
		fs = d.Breath(&br, fs[:0])
	}
	b.ReportAllocs()
	i := 100
	for b.Loop() {
		br.Seq, br.StartS, br.EndS = i, float64(i)*3, float64(i+1)*3
		br.PeakCmH2O = 38.5 + float64(i%7)*0.1
		fs = d.Breath(&br, fs[:0])
		i++
	}
}
