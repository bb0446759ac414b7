package cli

import (
	"context"
	"fmt"
	"io"
	"math"
	"strconv"
	"text/tabwriter"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"

	"trapline/analyze"
)

// predictFlags are the options of `trapline predict`.
type predictFlags struct {
	r, c, deadSpace, target, paco2      float64
	from                                string
	vt, flow, ti, pause, rate, peep     float64
	candVT, candFlow, candTi, candPause []float64
	candRate, candPEEP                  []float64
	in                                  inputFlags // of --from
}

// maxPredictRows bounds the table over the candidate lists.
const maxPredictRows = 500

func (a *app) predictCommand() *cobra.Command {
	f := predictFlags{deadSpace: 150, target: 50}
	cmd := &cobra.Command{
		Use:   "predict",
		Short: "What-if: steady-state trapped volume and intrinsic PEEP at other ventilator settings",
		Long: "predict takes a patient's resistance and compliance (from flags, or the median of the reliable\n" +
			"breaths of a recording with --from) and the current volume-control settings, and predicts for\n" +
			"each candidate setting the steady-state trapped volume, intrinsic PEEP, plateau and peak\n" +
			"pressure, expiratory time and Te/τ, minute ventilation and the expected relative change of\n" +
			"PaCO2 (alveolar ventilation equation, with a dead space of --dead-space mL). It also gives the\n" +
			"rate and the inspiratory flow that bring trapped volume under --target-trapped mL.\n" +
			"The model is a passive, linear single compartment with square inspiratory flow: flow\n" +
			"limitation, unequal time constants and patient effort make real trapping worse.\n\n" +
			"  trapline predict --r 25 --c 60 --vt 600 --flow 45 --rate 24 --peep 5 --cand-rate 12,16,20\n" +
			"  trapline predict --from bench-a.csv --cand-flow 60,80 --target-trapped 50\n\n" +
			Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			f.in.streamSet = cmd.Flags().Changed("stream")
			return a.runPredict(cmd.Context(), cmd.Flags(), f, cmd.OutOrStdout())
		},
	}
	fl := cmd.Flags()
	fl.Float64Var(&f.r, "r", 0, "resistance, cmH2O·s/L")
	fl.Float64Var(&f.c, "c", 0, "compliance, mL/cmH2O")
	fl.StringVar(&f.from, "from", "", "estimate R, C and the current settings from a recording (FILE, DIR or -)")
	fl.Float64Var(&f.vt, "vt", 0, "current tidal volume, mL")
	fl.Float64Var(&f.flow, "flow", 0, "current inspiratory flow, L/min (square)")
	fl.Float64Var(&f.ti, "ti", 0, "current inspiratory flow time, s (instead of --flow)")
	fl.Float64Var(&f.pause, "pause", 0, "current end-inspiratory pause, s")
	fl.Float64Var(&f.rate, "rate", 0, "current rate, /min")
	fl.Float64Var(&f.peep, "peep", 0, "current PEEP, cmH2O")
	fl.Float64SliceVar(&f.candVT, "cand-vt", nil, "candidate tidal volumes, mL")
	fl.Float64SliceVar(&f.candFlow, "cand-flow", nil, "candidate inspiratory flows, L/min")
	fl.Float64SliceVar(&f.candTi, "cand-ti", nil, "candidate inspiratory flow times, s (instead of flows)")
	fl.Float64SliceVar(&f.candPause, "cand-pause", nil, "candidate pauses, s")
	fl.Float64SliceVar(&f.candRate, "cand-rate", nil, "candidate rates, /min")
	fl.Float64SliceVar(&f.candPEEP, "cand-peep", nil, "candidate PEEPs, cmH2O")
	fl.Float64Var(&f.target, "target-trapped", f.target, "target trapped volume, mL")
	fl.Float64Var(&f.deadSpace, "dead-space", f.deadSpace, "dead space for alveolar ventilation, mL (about 150 mL in an adult: common practice)")
	fl.Float64Var(&f.paco2, "paco2", 0, "current PaCO2 (any unit) to print the expected values instead of ratios")
	f.in.register(fl, false)
	return cmd
}

// settingsFrom fills current settings and mechanics from a recording: the
// medians of its breaths (mechanics over reliable breaths only). Flags that
// were set explicitly win.
func (a *app) settingsFrom(ctx context.Context, fs *pflag.FlagSet, f *predictFlags) error {
	af := analyzeFlags{in: f.in, summary: true}
	if err := af.in.check(); err != nil {
		return err
	}
	o := newOffline(analyze.DefaultConfig(), io.Discard, true)
	if _, err := a.readAll(ctx, f.from, af, o); err != nil {
		return err
	}
	bs := o.kept
	if f.in.streamSet {
		keep := bs[:0]
		for _, b := range bs {
			if b.Stream == f.in.stream {
				keep = append(keep, b)
			}
		}
		bs = keep
	}
	s := analyze.Summarize(bs)
	if s.Reliable == 0 {
		return fmt.Errorf("%s: no reliable breath (of %s) to estimate R and C from", f.from, plural(s.Breaths, "breath", "breaths"))
	}
	pif := medianPIF(bs)
	set := func(name string, dst *float64, v float64) {
		if !fs.Changed(name) {
			*dst = v
		}
	}
	set("r", &f.r, s.RCmH2OSPerL)
	set("c", &f.c, s.CMLPerCmH2O)
	set("vt", &f.vt, s.VtiML)
	set("rate", &f.rate, s.RateBPM)
	set("peep", &f.peep, s.PEEPCmH2O)
	if !fs.Changed("flow") && !fs.Changed("ti") {
		f.flow = pif
		if ti := medianTi(bs); !fs.Changed("pause") && pif > 0 && ti > 0 {
			// The inspiratory time of a record includes the pause.
			// Below 50 ms the difference is sampling, not a pause.
			if f.pause = ti - f.vt/1000/(pif/60); f.pause < 0.05 {
				f.pause = 0
			}
		}
	}
	return nil
}

func medianPIF(bs []analyze.Breath) float64 {
	return analyze.MedianOf(bs, func(b *analyze.Breath) float64 { return b.PeakInspFlowLPM })
}

func medianTi(bs []analyze.Breath) float64 {
	return analyze.MedianOf(bs, func(b *analyze.Breath) float64 { return b.TiS })
}

func (a *app) runPredict(ctx context.Context, fs *pflag.FlagSet, f predictFlags, w io.Writer) error {
	source := "given"
	if f.from != "" {
		if err := a.settingsFrom(ctx, fs, &f); err != nil {
			return err
		}
		source = "median of the reliable breaths of " + f.from
	}
	if !(f.r > 0) || !(f.c > 0) || math.IsInf(f.r, 0) || math.IsInf(f.c, 0) {
		return usageErrorf("resistance and compliance must be positive: give --r and --c, or --from a recording")
	}
	if !(f.deadSpace >= 0) || !(f.target > 0) {
		return usageErrorf("--dead-space must not be negative and --target-trapped must be positive")
	}
	pt := analyze.Patient{RCmH2OSPerL: f.r, CMLPerCmH2O: f.c, DeadSpaceML: f.deadSpace}
	cur := analyze.Settings{VtML: f.vt, FlowLPM: f.flow, InspTimeS: f.ti, PauseS: f.pause, RateBPM: f.rate, PEEPCmH2O: f.peep}
	if f.ti > 0 && !fs.Changed("flow") {
		cur.FlowLPM = 0
	}
	base, err := analyze.Predict(pt, cur)
	if err != nil {
		return usageErrorf("current settings: %v", err)
	}
	rows, err := predictRows(pt, base, f)
	if err != nil {
		return err
	}
	tau := base.TauS
	cur = base.Settings
	fmt.Fprintf(w, "MODEL PREDICTION (passive linear single compartment, square flow, steady state)\n")
	fmt.Fprintf(w, "patient: R %.1f cmH2O·s/L, C %.1f mL/cmH2O, τ %.2f s (%s); dead space %g mL\n", f.r, f.c, tau, source, f.deadSpace)
	fmt.Fprintf(w, "expiratory time for trapped volume ≤ %g mL at VT %.0f mL: %.2f s\n\n", f.target, cur.VtML, analyze.TeForTrapped(cur.VtML, tau, f.target))
	if err := writePredictTable(w, base, rows, f.paco2); err != nil {
		return fmt.Errorf("write table: %w", err)
	}
	_, err = fmt.Fprintf(w, "\nPressures in cmH2O. Flow limitation, unequal time constants and effort make real trapping\n"+
		"worse than this model predicts; measure after any change.\n%s\n", Caution)
	return err
}

// predictRow is one line of the prediction table.
type predictRow struct {
	label string
	p     analyze.Prediction
}

// candidateLists checks the --cand lists: every value finite and positive
// (PEEP and pause may be 0), so that an impossible candidate is a usage
// error before any table is printed.
func candidateLists(f predictFlags) error {
	for _, l := range []struct {
		name   string
		vs     []float64
		zeroOK bool
	}{{"cand-vt", f.candVT, false}, {"cand-flow", f.candFlow, false}, {"cand-ti", f.candTi, false},
		{"cand-pause", f.candPause, true}, {"cand-rate", f.candRate, false}, {"cand-peep", f.candPEEP, true}} {
		for _, v := range l.vs {
			if math.IsNaN(v) || math.IsInf(v, 0) || v < 0 || (v == 0 && !l.zeroOK) {
				want := "positive numbers"
				if l.zeroOK {
					want = "numbers of 0 or more"
				}
				return usageErrorf("--%s %g: want %s", l.name, v, want)
			}
		}
	}
	return nil
}

// predictRows predicts every combination of the candidate lists (each
// defaulting to the current value) and the settings that reach the target.
func predictRows(pt analyze.Patient, base analyze.Prediction, f predictFlags) ([]predictRow, error) {
	if err := candidateLists(f); err != nil {
		return nil, err
	}
	cur := base.Settings
	or := func(l []float64, v float64) []float64 {
		if len(l) == 0 {
			return []float64{v}
		}
		return l
	}
	flows, tis := or(f.candFlow, cur.FlowLPM), []float64{0}
	if len(f.candTi) > 0 {
		flows, tis = []float64{0}, f.candTi
	}
	var cands []analyze.Settings
	for _, vt := range or(f.candVT, cur.VtML) {
		for _, fl := range flows {
			for _, ti := range tis {
				for _, pa := range or(f.candPause, cur.PauseS) {
					for _, rr := range or(f.candRate, cur.RateBPM) {
						for _, pe := range or(f.candPEEP, cur.PEEPCmH2O) {
							cands = append(cands, analyze.Settings{VtML: vt, FlowLPM: fl, InspTimeS: ti, PauseS: pa, RateBPM: rr, PEEPCmH2O: pe})
						}
					}
				}
			}
		}
	}
	if len(cands) > maxPredictRows {
		return nil, usageErrorf("%d candidate combinations, more than %d: shorten the --cand lists", len(cands), maxPredictRows)
	}
	rows := []predictRow{{label: "current", p: base}}
	for _, s := range cands {
		p, err := analyze.Predict(pt, s)
		if err != nil {
			return nil, usageErrorf("candidate VT %g mL, flow %g L/min, Ti %g s, pause %g s, rate %g /min, PEEP %g: %v",
				s.VtML, s.FlowLPM, s.InspTimeS, s.PauseS, s.RateBPM, s.PEEPCmH2O, err)
		}
		if p.Settings != cur {
			rows = append(rows, predictRow{label: "candidate", p: p})
		}
	}
	tau := base.TauS
	if r := analyze.RateForTrapped(cur, tau, f.target); !math.IsNaN(r) {
		s := cur
		s.RateBPM = r
		if p, err := analyze.Predict(pt, s); err == nil {
			rows = append(rows, predictRow{label: fmt.Sprintf("rate for ≤ %g mL", f.target), p: p})
		}
	}
	if fl := analyze.FlowForTrapped(cur, tau, f.target); !math.IsNaN(fl) {
		s := cur
		s.FlowLPM, s.InspTimeS = fl, 0
		if p, err := analyze.Predict(pt, s); err == nil {
			rows = append(rows, predictRow{label: fmt.Sprintf("flow for ≤ %g mL", f.target), p: p})
		}
	}
	return rows, nil
}

// writePredictTable prints the rows as an aligned table.
func writePredictTable(w io.Writer, base analyze.Prediction, rows []predictRow, paco2 float64) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	head := "PaCO2 ×"
	if paco2 > 0 {
		head = "PaCO2"
	}
	fmt.Fprintf(tw, "\tVT mL\tflow L/min\tTi s\tpause s\trate /min\tPEEP\tTe s\tTe/τ\ttrapped mL\tPEEPi\tPplat\tPpeak\tVE L/min\t%s\t\n", head)
	num := func(v float64, prec int) string {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return "-"
		}
		return strconv.FormatFloat(v, 'f', prec, 64)
	}
	for _, r := range rows {
		s := r.p.Settings
		ratio := analyze.PaCO2Ratio(base, r.p)
		if paco2 > 0 {
			ratio *= paco2
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t\n", r.label,
			num(s.VtML, 0), num(s.FlowLPM, 1), num(s.InspTimeS, 2), num(s.PauseS, 2), num(s.RateBPM, 1), num(s.PEEPCmH2O, 1),
			num(r.p.TeS, 2), num(r.p.TeOverTau, 2), num(r.p.TrappedML, 0), num(r.p.PEEPiCmH2O, 1),
			num(r.p.PlateauCmH2O, 1), num(r.p.PeakCmH2O, 1), num(r.p.MinuteVolLPM, 2), num(ratio, 2))
	}
	return tw.Flush()
}
