package analyze

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// gridErrors collects per-breath errors against ground truth.
type gridErrors struct {
	r, c, vt, rate, plat, peepi []float64
	peepiOK, peepiN             int
	name                        string
}

func median(x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	s := slices.Clone(x)
	slices.Sort(s)
	if len(s)%2 == 1 {
		return s[len(s)/2]
	}
	return (s[len(s)/2-1] + s[len(s)/2]) / 2
}

func maxOf(x []float64) float64 {
	m := math.NaN()
	for _, v := range x {
		if !(v <= m) {
			m = v
		}
	}
	return m
}

func (g *gridErrors) String() string {
	return fmt.Sprintf("%s: median |err| R %.2f%% C %.2f%% VT %.2f%%; rate max %.3f /min; plateau max %.2f cmH2O; PEEPi within max(1 cmH2O, 15%%) on %d/%d (%.1f%%), median |err| %.2f cmH2O",
		g.name, 100*median(g.r), 100*median(g.c), 100*median(g.vt), maxOf(g.rate), maxOf(g.plat), g.peepiOK, g.peepiN, 100*float64(g.peepiOK)/float64(g.peepiN), median(g.peepi))
}

// TestLinearGridClosedForm runs the acceptance grid of the linear
// single-compartment patient against the exact solution of its equation of
// motion (Bates 2009; trapped volume and intrinsic PEEP from the linear single-compartment model, docs/formulas.md,
// derived): R 5–50 cmH2O·s/L, C 20–100 mL/cmH2O, rate 10–30, VT 300–700 mL,
// square flow with and without pause, PEEP 0–15, 50/100/200 Hz, noise σ
// 0.3 cmH2O and 1 L/min. Configurations are drawn at random (fixed seed)
// from the grid.
func TestLinearGridClosedForm(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	pick := func(v ...float64) float64 { return v[rng.IntN(len(v))] }
	g := gridErrors{name: "closed form"}
	configs := 0
	for configs < 160 {
		m := linearVC{
			R: pick(5, 10, 20, 35, 50), C: pick(20, 40, 60, 80, 100) / 1000,
			Rate: pick(10, 15, 20, 25, 30), VT: pick(300, 400, 500, 600, 700) / 1000,
			PEEP: pick(0, 5, 10, 15), Fs: pick(50, 100, 200), Pause: pick(0, 0.3),
			NoiseP: 0.3, NoiseF: 1.0 / 60, Steady: true, Seed: rng.Uint64(),
		}
		m.TFlow = m.VT / pick(0.5, 0.75, 1.0)
		m.Offset = rng.Float64() / m.Fs
		if m.te() < 0.6 {
			continue
		}
		configs++
		bs := run(DefaultConfig(), m.samples(8))
		if len(bs) < 5 {
			t.Errorf("%+v: %d breaths from 8 cycles", m, len(bs))
			continue
		}
		for _, b := range bs {
			k := int(math.Round(b.StartS / m.period()))
			tr := m.truthOf(k)
			g.r = append(g.r, math.Abs(b.RCmH2OSPerL/m.R-1))
			g.c = append(g.c, math.Abs(b.CMLPerCmH2O/(1000*m.C)-1))
			g.vt = append(g.vt, math.Abs(b.VtiML/(1000*m.VT)-1))
			g.rate = append(g.rate, math.Abs(b.RateBPM-m.Rate))
			if math.Abs(b.RateBPM-m.Rate) > 0.1 {
				t.Logf("rate %.3f want %v: %+v start %.4f truth %.4f", b.RateBPM, m.Rate, m, b.StartS, tr.StartS)
			}
			if m.Pause > 0 {
				g.plat = append(g.plat, math.Abs(b.PlateauCmH2O-tr.Pplat))
			} else if !math.IsNaN(b.PlateauCmH2O) {
				t.Errorf("%+v: plateau %v without a pause", m, b.PlateauCmH2O)
			}
			e := math.Abs(b.PEEPiCmH2O - tr.PEEPi)
			g.peepi = append(g.peepi, e)
			g.peepiN++
			if e <= math.Max(1.0, 0.15*tr.PEEPi) {
				g.peepiOK++
			}
		}
	}
	t.Log(g.String())
	// Acceptance bounds of the analysis (project targets).
	if median(g.r) > 0.05 || median(g.c) > 0.05 || median(g.vt) > 0.02 {
		t.Errorf("median errors over bound: %s", g.String())
	}
	if maxOf(g.rate) > 0.1 || maxOf(g.plat) > 0.5 {
		t.Errorf("rate or plateau over bound: %s", g.String())
	}
	if float64(g.peepiOK) < 0.95*float64(g.peepiN) {
		t.Errorf("PEEPi within tolerance on fewer than 95%% of breaths: %s", g.String())
	}
}
