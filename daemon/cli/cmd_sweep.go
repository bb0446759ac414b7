package cli

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"github.com/mattn/go-isatty"
	"github.com/schollz/progressbar/v3"
	"github.com/spf13/cobra"

	"trapline/analyze"
	"trapline/config"
	"trapline/daemon"
	"trapline/simulator/sweep"
)

// sweepFlags are the options of `trapline sweep`.
type sweepFlags struct {
	grid       string
	quick      bool
	out        string
	configPath string
	compare    string
	workers    int
	seeds      int
	noProgress bool
}

func (a *app) sweepCommand() *cobra.Command {
	var f sweepFlags
	cmd := &cobra.Command{
		Use:   "sweep",
		Short: "Measure the detectors and estimators against simulated patients (HTML report and JSON summary)",
		Long: `Run every detector and estimator against a grid of simulated patients with known
ground truth: patient models (linear, rohrer, two-compartment, flow-limited, effort) ×
resistance × compliance × ventilator settings × sensor noise × seeds, plus the shipped
scenarios. Patients run in-process on one worker per core.

Writes OUT/report.html (self-contained, SVG plots inlined) and OUT/summary.json:
sensitivity and specificity per breath and per episode, false alerts per simulated
hour, onset and clearing latencies, and estimator errors by patient model.

Without --grid the default grid runs (over 500 patient-hours); --quick runs a small
grid in under a minute. --config takes the detectors:, alarms: and analysis:
sections of a config file; --compare runs a second config's detectors: and alarms:
on the same patients and reports the differences. The grid file format and the
definitions of every figure are in docs/sweep.md.

` + Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error { return a.runSweep(cmd, &f) },
	}
	fl := cmd.Flags()
	fl.StringVar(&f.grid, "grid", "", "grid file (YAML); default: the built-in grid")
	fl.BoolVar(&f.quick, "quick", false, "run the small built-in grid (under a minute)")
	fl.StringVarP(&f.out, "out", "o", "sweep-out", "directory for report.html and summary.json")
	fl.StringVar(&f.configPath, "config", "", "config file whose detectors:, alarms: and analysis: sections to use")
	fl.StringVar(&f.compare, "compare", "", "second config file whose detectors: and alarms: run side by side")
	fl.IntVar(&f.workers, "workers", 0, "parallel simulations (0: one per core)")
	fl.IntVar(&f.seeds, "seeds", 0, "repetitions with different noise seeds (0: as the grid says)")
	fl.BoolVar(&f.noProgress, "no-progress", false, "do not draw the progress bar")
	return cmd
}

// sweepSet loads the detector set of a config file.
func sweepSet(path string) (sweep.DetectorSet, *analyze.Config, error) {
	cfg, err := config.Load(path, nil)
	if err != nil {
		return sweep.DetectorSet{}, nil, &daemon.UsageError{Err: fmt.Errorf("sweep: %w", err)}
	}
	name := strings.TrimSuffix(filepath.Base(path), filepath.Ext(path))
	return sweep.DetectorSet{Name: name, Detectors: cfg.Detectors, Alarms: cfg.Alarms}, &cfg.Analysis, nil
}

// sweepPlan builds the grid of the flags and expands it.
func sweepPlan(f *sweepFlags) (sweep.Grid, *sweep.Plan, error) {
	if f.quick && f.grid != "" {
		return sweep.Grid{}, nil, usageErrorf("sweep: --quick and --grid exclude each other")
	}
	if f.workers < 0 || f.seeds < 0 {
		return sweep.Grid{}, nil, usageErrorf("sweep: --workers and --seeds must not be negative")
	}
	g := sweep.DefaultGrid()
	switch {
	case f.quick:
		g = sweep.QuickGrid()
	case f.grid != "":
		var err error
		if g, err = sweep.LoadGrid(f.grid); err != nil {
			return g, nil, &daemon.UsageError{Err: fmt.Errorf("sweep: %w", err)}
		}
	}
	if f.seeds > 0 {
		g.Seeds = f.seeds
	}
	plan, err := g.Expand()
	if err != nil {
		return g, plan, &daemon.UsageError{Err: fmt.Errorf("sweep: grid: %w", err)}
	}
	return g, plan, nil
}

// sweepOptions builds the detector sets of --config and --compare.
func sweepOptions(f *sweepFlags) (sweep.Options, error) {
	opt := sweep.Options{Workers: f.workers}
	first := sweep.DefaultDetectorSet()
	if f.configPath != "" {
		var err error
		if first, opt.Analysis, err = sweepSet(f.configPath); err != nil {
			return opt, err
		}
	}
	opt.Sets = []sweep.DetectorSet{first}
	if f.compare != "" {
		second, _, err := sweepSet(f.compare)
		if err != nil {
			return opt, err
		}
		if second.Name == first.Name {
			second.Name += " (compare)"
		}
		opt.Sets = append(opt.Sets, second)
	}
	return opt, nil
}

// sweepProgress draws a progress bar of simulated seconds on a terminal;
// done ends it.
func sweepProgress(w io.Writer, totalS float64) (progress func(float64), done func()) {
	if !isTerminal(w) {
		return nil, func() {}
	}
	bar := progressbar.NewOptions64(int64(totalS),
		progressbar.OptionSetWriter(w),
		progressbar.OptionSetDescription("simulating"),
		progressbar.OptionSetPredictTime(true),
		progressbar.OptionSetElapsedTime(true),
		progressbar.OptionSetWidth(40),
		progressbar.OptionThrottle(200*time.Millisecond),
		progressbar.OptionClearOnFinish(),
	)
	var mu sync.Mutex
	acc := 0.0
	return func(s float64) {
		mu.Lock()
		acc += s
		whole := int64(acc)
		acc -= float64(whole)
		mu.Unlock()
		_ = bar.Add64(whole)
	}, func() { _ = bar.Exit() }
}

func (a *app) runSweep(cmd *cobra.Command, f *sweepFlags) error {
	g, plan, err := sweepPlan(f)
	if err != nil {
		return err
	}
	opt, err := sweepOptions(f)
	if err != nil {
		return err
	}
	if err := os.MkdirAll(f.out, 0o755); err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	stderr := cmd.ErrOrStderr()
	fmt.Fprintf(stderr, "sweep: %s, %.1f simulated patient-hours at %v Hz, detector sets: %s\n",
		plural(len(plan.Cases), "patient", "patients"), plan.TotalS()/3600, g.SampleRatesHz, setNames(opt.Sets))
	if !f.noProgress {
		var done func()
		opt.Progress, done = sweepProgress(stderr, plan.TotalS())
		defer done()
	}
	res, err := sweep.Run(cmd.Context(), plan, opt)
	if err != nil {
		if errors.Is(err, cmd.Context().Err()) && cmd.Context().Err() != nil {
			return fmt.Errorf("sweep: cancelled: %w", err)
		}
		return fmt.Errorf("sweep: %w", err)
	}
	sum := sweep.Summarize(res)
	ex, err := sweep.PickExample(cmd.Context(), res, opt.Analysis)
	if err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	jsonPath, htmlPath, err := writeSweepFiles(f.out, res, sum, ex)
	if err != nil {
		return err
	}
	printSweepHeadline(cmd.OutOrStdout(), sum)
	fmt.Fprintf(cmd.OutOrStdout(), "report: %s\nsummary: %s\n", htmlPath, jsonPath)
	return nil
}

// writeSweepFiles writes summary.json and report.html into dir.
func writeSweepFiles(dir string, res *sweep.Result, sum *sweep.Summary, ex *sweep.Example) (jsonPath, htmlPath string, err error) {
	js, err := sum.JSON()
	if err != nil {
		return "", "", err
	}
	jsonPath = filepath.Join(dir, "summary.json")
	if err := os.WriteFile(jsonPath, js, 0o644); err != nil {
		return "", "", fmt.Errorf("sweep: %w", err)
	}
	htmlPath = filepath.Join(dir, "report.html")
	hf, err := os.Create(htmlPath)
	if err != nil {
		return "", "", fmt.Errorf("sweep: %w", err)
	}
	if err := sweep.WriteReport(hf, res, sum, ex); err != nil {
		hf.Close()
		return "", "", fmt.Errorf("sweep: %w", err)
	}
	if err := hf.Close(); err != nil {
		return "", "", fmt.Errorf("sweep: %w", err)
	}
	return jsonPath, htmlPath, nil
}

func setNames(sets []sweep.DetectorSet) string {
	names := make([]string, len(sets))
	for i, s := range sets {
		names[i] = s.Name
	}
	return strings.Join(names, ", ")
}

func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	return ok && (isatty.IsTerminal(f.Fd()) || isatty.IsCygwinTerminal(f.Fd()))
}

// printSweepHeadline prints the headline figures as a plain table.
func printSweepHeadline(w io.Writer, s *sweep.Summary) {
	fmt.Fprintf(w, "%d patients, %.1f patient-hours in %.1f s on %d workers (%.0fx real time)\n",
		s.Patients, float64(s.PatientHours), float64(s.ElapsedS), s.Workers, float64(s.RealtimeFactor))
	for _, set := range s.Sets {
		fmt.Fprintf(w, "\n%s\n%-24s %8s %8s %8s %8s %9s %9s %9s\n", set.Name, "condition",
			"sens/br", "spec/br", "sens/ep", "spec/ep", "false/h", "onset s", "clear s")
		for _, c := range set.Conditions {
			fmt.Fprintf(w, "%-24s %8s %8s %8s %8s %9s %9s %9s\n", c.Condition,
				fmtRatio(c.Breath.Sensitivity), fmtRatio(c.Breath.Specificity),
				fmtRatio(c.Episode.Sensitivity), fmtRatio(c.Episode.Specificity),
				fmtNum(c.FalseAlertsPerHour, 3), fmtNum(c.Onset.MedianS, 1), fmtNum(c.Clearing.MedianS, 1))
		}
	}
}

func fmtRatio(n sweep.Num) string { return fmtNum(n*100, 1) }

func fmtNum(n sweep.Num, prec int) string {
	if f := float64(n); math.IsNaN(f) || math.IsInf(f, 0) {
		return "-"
	}
	return fmt.Sprintf("%.*f", prec, float64(n))
}
