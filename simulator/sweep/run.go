package sweep

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"time"

	"golang.org/x/sync/errgroup"

	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// HighPeakCmH2O is the true peak pressure above which a breath is labelled
// high-peak-pressure for scoring; the simulator labels the other
// conditions itself. 50 cmH2O: peak pressure alarm limits around 45–50
// cmH2O are common practice.
const HighPeakCmH2O = 50.0

// Scored lists the conditions that have a ground truth and are scored, in
// report order.
func Scored() []string {
	return []string{analyze.CondAirTrapping, analyze.CondRisingPeakPressure, analyze.CondHighPeakPressure,
		analyze.CondHighPlateauPressure, analyze.CondHighDrivingPressure, analyze.CondSignalLost}
}

// TruthBreath is the ground truth of one simulated breath, as scoring uses
// it.
type TruthBreath struct {
	StartS float64 `json:"t_start_s"`
	EndS   float64 `json:"t_end_s"`
	// Labels has bit i set when the breath truly has Scored()[i].
	Labels       uint16  `json:"labels"`
	PEEPiCmH2O   float64 `json:"peepi_cmh2o"`
	TrappedML    float64 `json:"trapped_ml"`
	PlateauCmH2O float64 `json:"pplat_cmh2o"`
	DrivingCmH2O float64 `json:"dp_cmh2o"`
	PeakCmH2O    float64 `json:"pip_cmh2o"`
	RCmH2OSPerL  float64 `json:"r_cmh2o_s_per_l"`
	CMLPerCmH2O  float64 `json:"c_ml_per_cmh2o"`
	TauS         float64 `json:"tau_s"`
	Passive      bool    `json:"passive"`
	// Hold is true when the breath's expiration ended in a hold.
	Hold bool `json:"exp_hold,omitempty"`
}

// Has reports whether the breath truly has the scored condition with index i.
func (t *TruthBreath) Has(i int) bool { return t.Labels&(1<<i) != 0 }

// truthBreath condenses the simulator's truth.
func truthBreath(tr *simulator.Truth) TruthBreath {
	tb := TruthBreath{
		StartS: tr.StartS, EndS: tr.EndS,
		PEEPiCmH2O: tr.PEEPiCmH2O, TrappedML: tr.TrappedML, PlateauCmH2O: tr.PlateauCmH2O,
		DrivingCmH2O: tr.DrivingCmH2O, PeakCmH2O: tr.PeakCmH2O,
		RCmH2OSPerL: tr.RCmH2OSPerL, CMLPerCmH2O: tr.CMLPerCmH2O, TauS: tr.TauS, Passive: tr.Passive,
		Hold: tr.ExpHoldS > 0,
	}
	for i, c := range Scored() {
		has := tr.HasLabel(c)
		if c == analyze.CondHighPeakPressure {
			has = tr.PeakCmH2O > HighPeakCmH2O
		}
		if has {
			tb.Labels |= 1 << i
		}
	}
	return tb
}

// AlertEvent is one alert event as scoring uses it.
type AlertEvent struct {
	Condition string  `json:"condition"`
	State     string  `json:"state"`
	TS        float64 `json:"t_s"`
	// Fresh is true for a raise that starts a new alarm (not one that
	// supersedes an earlier id of the same alarm).
	Fresh bool `json:"fresh"`
}

// Estimate is what the analyzer estimated for one breath, next to the
// truth of the simulated breath it matches. NaN means the analyzer gave no
// value (null in the breath record).
type Estimate struct {
	// Truth indexes CaseResult.Truth.
	Truth       int32
	RCmH2OSPerL float32
	CMLPerCmH2O float32
	TauS        float32
	TrappedML   float32
	PEEPiCmH2O  float32
	// PEEPiBound is true when the record flags its intrinsic PEEP as a
	// lower bound.
	PEEPiBound bool
	// Hold is true when the record flags an end-expiratory hold, and
	// HoldUnsettled when it flags the hold's pressure still rising.
	Hold, HoldUnsettled bool
}

// CaseResult is everything one simulated patient produced.
type CaseResult struct {
	Case  *Case
	Truth []TruthBreath
	// Breaths counts the breaths the analyzer completed; Unmatched those
	// that matched no simulated breath.
	Breaths   int
	Unmatched int
	Estimates []Estimate
	// Alerts holds the alert events of each detector set, in order.
	Alerts [][]AlertEvent
	// Samples counts the samples analysed.
	Samples int64
}

// Options tunes a run.
type Options struct {
	// Sets are the detector configurations; each sees the same patients.
	// Empty means DefaultDetectorSet.
	Sets []DetectorSet
	// Analysis configures breath segmentation and the fits; the zero value
	// means analyze.DefaultConfig.
	Analysis *analyze.Config
	// Workers bounds the parallel simulations; zero means one per core.
	Workers int
	// Progress, when set, is called from the workers with simulated
	// seconds completed since the last call; it must be safe for
	// concurrent use.
	Progress func(simS float64)
}

// Result is a completed sweep.
type Result struct {
	Plan  *Plan
	Sets  []DetectorSet
	Cases []CaseResult
	// Elapsed is the wall time of the simulations; Workers how many ran.
	Elapsed time.Duration
	Workers int
}

// Run simulates every case of the plan on a bounded pool of workers and
// returns the raw results. It returns early with ctx's error when ctx is
// cancelled.
func Run(ctx context.Context, plan *Plan, opt Options) (*Result, error) {
	sets := opt.Sets
	if len(sets) == 0 {
		sets = []DetectorSet{DefaultDetectorSet()}
	}
	for i := range sets {
		if errs := sets[i].Validate(); len(errs) > 0 {
			return nil, fmt.Errorf("detector set %s: %w", sets[i].Name, errors.Join(errs...))
		}
	}
	acfg := analyze.DefaultConfig()
	if opt.Analysis != nil {
		acfg = *opt.Analysis
	}
	if errs := acfg.Validate("analysis"); len(errs) > 0 {
		return nil, errors.Join(errs...)
	}
	workers := opt.Workers
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	workers = min(workers, len(plan.Cases))
	res := &Result{Plan: plan, Sets: sets, Cases: make([]CaseResult, len(plan.Cases)), Workers: workers}
	start := time.Now()

	// Longest cases first, so that the pool does not end on one straggler.
	order := make([]int, len(plan.Cases))
	for i := range order {
		order[i] = i
	}
	sortByDurationDesc(order, plan.Cases)

	g, gctx := errgroup.WithContext(ctx)
	jobs := make(chan int, workers)
	g.Go(func() error {
		defer close(jobs)
		for _, i := range order {
			select {
			case jobs <- i:
			case <-gctx.Done():
				return gctx.Err()
			}
		}
		return nil
	})
	for range workers {
		g.Go(func() error {
			for i := range jobs {
				r, err := runCase(gctx, &plan.Cases[i], sets, acfg, nil, opt.Progress)
				if err != nil {
					return err
				}
				res.Cases[i] = r
			}
			return nil
		})
	}
	if err := g.Wait(); err != nil {
		return nil, err
	}
	res.Elapsed = time.Since(start)
	return res, nil
}

func sortByDurationDesc(order []int, cases []Case) {
	// Insertion sort is enough for a few thousand cases and keeps the
	// order stable.
	for i := 1; i < len(order); i++ {
		for j := i; j > 0 && cases[order[j]].DurationS > cases[order[j-1]].DurationS; j-- {
			order[j], order[j-1] = order[j-1], order[j]
		}
	}
}

// recording keeps what the example waveform plot needs from one case.
type recording struct {
	fromS, toS float64
	samples    []ingest.Sample
	breaths    []analyze.Breath
}

// progressEveryS is how much simulated time a worker accumulates before
// reporting progress and checking for cancellation.
const progressEveryS = 60.0

// runCase simulates one patient through the analyzer and every detector
// set. rec, when not nil, records samples and breaths in its window.
func runCase(ctx context.Context, c *Case, sets []DetectorSet, acfg analyze.Config, rec *recording, progress func(float64)) (CaseResult, error) {
	sim, err := simulator.New(c.scenario)
	if err != nil {
		return CaseResult{}, fmt.Errorf("%s: %w", c.Name, err)
	}
	stream := sim.Stream()
	stages := make([]*stage, len(sets))
	for i := range sets {
		stages[i] = newStage(stream, acfg, &sets[i])
	}
	out := CaseResult{Case: c, Alerts: make([][]AlertEvent, len(sets))}
	lastReport := 0.0
	ti := 0 // next truth breath to match
	onBreath := func(b *analyze.Breath) {
		out.Breaths++
		if rec != nil && b.EndS >= rec.fromS && b.StartS <= rec.toS {
			rec.breaths = append(rec.breaths, *b)
		}
		ti = out.match(b, ti)
	}
	if len(stages) > 0 {
		stages[0].onBreath = onBreath
	}
	for {
		smp, ok := sim.Next()
		for _, le := range sim.TakeLinkEvents() {
			if le.Up {
				continue // the returning samples say so themselves
			}
			// A lost link is a disconnection of the source: the analysis
			// starts afresh so that no breath spans it.
			for _, s := range stages {
				s.pl.Status(ingest.Event{Stream: stream, Status: ingest.StatusDisconnected}, time.Time{})
			}
		}
		for _, tr := range sim.TakeTruth() {
			out.Truth = append(out.Truth, truthBreath(&tr))
		}
		if !ok {
			break
		}
		out.Samples++
		if rec != nil && smp.TimeS >= rec.fromS && smp.TimeS <= rec.toS {
			rec.samples = append(rec.samples, smp)
		}
		for _, s := range stages {
			s.pl.PushOne(smp, s)
		}
		if smp.TimeS-lastReport >= progressEveryS {
			if progress != nil {
				progress(smp.TimeS - lastReport)
			}
			lastReport = smp.TimeS
			if err := ctx.Err(); err != nil {
				return CaseResult{}, err
			}
		}
	}
	for _, s := range stages {
		s.pl.Finish(sim.DurationS(), s)
	}
	if progress != nil {
		progress(sim.DurationS() - lastReport)
	}
	for i, s := range stages {
		out.Alerts[i] = s.events
	}
	return out, nil
}

// match pairs an analysed breath with the simulated breath whose start is
// nearest, within a quarter of the breath, and records the estimates. ti is
// the first truth breath not yet passed; the new one is returned.
func (r *CaseResult) match(b *analyze.Breath, ti int) int {
	tol := 0.25 * (b.EndS - b.StartS)
	for ti < len(r.Truth) && r.Truth[ti].StartS < b.StartS-tol {
		ti++
	}
	best, bestD := -1, math.Inf(1)
	for j := ti; j < len(r.Truth) && r.Truth[j].StartS <= b.StartS+tol; j++ {
		if d := math.Abs(r.Truth[j].StartS - b.StartS); d < bestD {
			best, bestD = j, d
		}
	}
	if best < 0 {
		r.Unmatched++
		return ti
	}
	r.Estimates = append(r.Estimates, Estimate{
		Truth:       int32(best),
		RCmH2OSPerL: float32(b.RCmH2OSPerL),
		CMLPerCmH2O: float32(b.CMLPerCmH2O),
		TauS:        float32(b.TauS),
		TrappedML:   float32(b.TrappedML),
		PEEPiCmH2O:  float32(b.PEEPiCmH2O),
		PEEPiBound:  b.HasFlag(analyze.FlagPEEPiBound),
		Hold:        b.HasFlag(analyze.FlagExpHold),
		// A flag the record carries only with exp-hold.
		HoldUnsettled: b.HasFlag(analyze.FlagHoldUnsettled),
	})
	return best + 1
}
