package analyze

import "fmt"

// DetectorConfig holds every threshold, window and N-of-M rule of the
// detectors. It is the `detectors:` section of the daemon's configuration;
// DefaultDetectorConfig gives the defaults and the comments beside each one
// name its source, or say "common practice" where no single source exists,
// or "our choice" where the number is a tuning of this program.
type DetectorConfig struct {
	AirTrapping AirTrappingConfig `mapstructure:"air_trapping"`
	RisingPeak  RisingPeakConfig  `mapstructure:"rising_peak_pressure"`
	Limits      LimitsConfig      `mapstructure:"limits"`
	Signal      SignalConfig      `mapstructure:"signal"`
}

// AirTrappingConfig configures the air-trapping detector. A breath counts as
// positive when its end-expiratory flow is above EEFLPM, its intrinsic PEEP
// or trapped volume is above threshold (half the threshold while volume is
// building up breath after breath), and Te/τ is below TeOverTauMax; the
// condition is present when at least N of the last M breaths are positive.
type AirTrappingConfig struct {
	Enabled bool `mapstructure:"enabled"`
	// N of the last M breaths must be positive.
	N int `mapstructure:"n"`
	M int `mapstructure:"m"`
	// ClearN is the hysteresis of the N-of-M rule: once present, the
	// condition stays present while at least ClearN of the last M breaths
	// are positive (ClearN ≤ N).
	ClearN int `mapstructure:"clear_n"`
	// ClearFraction is the hysteresis of the magnitude: once present, a
	// breath counts as positive at this fraction of PEEPiCmH2O (and of
	// TrappedML), so that estimates scattering around the raising
	// threshold for an unchanged patient keep the condition present.
	ClearFraction float64 `mapstructure:"clear_fraction"`
	// EEFLPM is the end-expiratory flow (magnitude) above which expiration is
	// taken as unfinished.
	EEFLPM float64 `mapstructure:"eef_lpm"`
	// PEEPiCmH2O and TrappedML are the magnitude thresholds; either suffices.
	PEEPiCmH2O float64 `mapstructure:"peepi_cmh2o"`
	TrappedML  float64 `mapstructure:"trapped_ml"`
	// TeOverTauMax: a breath with Te/τ at or above it had time to empty.
	TeOverTauMax float64 `mapstructure:"te_over_tau_max"`
	// BalanceML is the inspired − expired volume, summed over the window,
	// that counts as build-up when the trapped-volume estimate rises by at
	// least half as much over the same window.
	BalanceML float64 `mapstructure:"balance_ml"`
	// Severity grading from the median intrinsic PEEP and trapped volume of
	// the positive breaths in the window: medium at or above the Medium
	// values, high at or above the High values, low otherwise.
	MediumPEEPiCmH2O float64 `mapstructure:"medium_peepi_cmh2o"`
	HighPEEPiCmH2O   float64 `mapstructure:"high_peepi_cmh2o"`
	MediumTrappedML  float64 `mapstructure:"medium_trapped_ml"`
	HighTrappedML    float64 `mapstructure:"high_trapped_ml"`
	// TargetTrappedML is the trapped volume of the what-if prediction
	// ("expiratory time that would bring the trapped volume below it").
	TargetTrappedML float64 `mapstructure:"target_trapped_ml"`
}

// RisingPeakConfig configures the rising-peak-pressure detector: the
// Theil–Sen slope of peak pressure over the last WindowS seconds (at most
// WindowBreaths breaths, which bounds memory) relative to the window's median
// peak pressure.
type RisingPeakConfig struct {
	Enabled       bool    `mapstructure:"enabled"`
	WindowS       float64 `mapstructure:"window_s"`
	WindowBreaths int     `mapstructure:"window_breaths"`
	// MinBreaths is the fewest breaths in the window for a verdict.
	MinBreaths int `mapstructure:"min_breaths"`
	// SlopePctPerMin is the rise, in percent of the median peak pressure per
	// minute, at which the condition is present.
	SlopePctPerMin float64 `mapstructure:"slope_pct_per_min"`
	// ClearSlopePctPerMin is the slope below which a present condition goes
	// absent again (hysteresis); at most SlopePctPerMin.
	ClearSlopePctPerMin float64 `mapstructure:"clear_slope_pct_per_min"`
	// HighSlopePctPerMin grades the severity high; below it, medium.
	HighSlopePctPerMin float64 `mapstructure:"high_slope_pct_per_min"`
}

// LimitConfig is one absolute pressure limit. Severity is medium at the
// limit and high at the limit plus HighMarginCmH2O; a present condition goes
// absent when the value falls below the limit minus HysteresisCmH2O.
type LimitConfig struct {
	Enabled         bool    `mapstructure:"enabled"`
	LimitCmH2O      float64 `mapstructure:"limit_cmh2o"`
	HighMarginCmH2O float64 `mapstructure:"high_margin_cmh2o"`
	HysteresisCmH2O float64 `mapstructure:"hysteresis_cmh2o"`
}

// LimitsConfig configures the absolute limits.
type LimitsConfig struct {
	HighPeak    LimitConfig `mapstructure:"high_peak_pressure"`
	HighPlateau LimitConfig `mapstructure:"high_plateau_pressure"`
	HighDriving LimitConfig `mapstructure:"high_driving_pressure"`
	// EstimateWithoutPause lets the plateau and driving-pressure limits use
	// the least-squares fit (total PEEP + VT/C) when a breath has no
	// end-inspiratory pause; the finding then carries "estimated": 1.
	EstimateWithoutPause bool `mapstructure:"estimate_without_pause"`
	// MinFitR2 is the lowest fit quality accepted for such an estimate.
	MinFitR2 float64 `mapstructure:"min_fit_r2"`
}

// SignalConfig configures the technical detectors.
type SignalConfig struct {
	Enabled bool `mapstructure:"enabled"`
	// LostAfterS: signal-lost when no sample has arrived for this long.
	LostAfterS float64 `mapstructure:"lost_after_s"`
	// WindowS is the window over which the implausibility checks run.
	WindowS float64 `mapstructure:"window_s"`
	// FlatPressureCmH2O and FlatFlowLPM: a window whose pressure and flow
	// both vary less than this (max − min) is a flat line.
	FlatPressureCmH2O float64 `mapstructure:"flat_pressure_cmh2o"`
	FlatFlowLPM       float64 `mapstructure:"flat_flow_lpm"`
	// Physical range of the signals; a sample outside it is implausible, and
	// a run of ClipRun identical samples within ClipMarginFrac of the range's
	// ends is clipping.
	PressureMinCmH2O float64 `mapstructure:"pressure_min_cmh2o"`
	PressureMaxCmH2O float64 `mapstructure:"pressure_max_cmh2o"`
	FlowMaxLPM       float64 `mapstructure:"flow_max_lpm"`
	ClipRun          int     `mapstructure:"clip_run"`
	ClipMarginFrac   float64 `mapstructure:"clip_margin_frac"`
	// ReversedCorrMax: a window whose pressure–flow correlation is below it
	// suggests a reversed flow sign (inspiratory flow must be positive).
	ReversedCorrMax float64 `mapstructure:"reversed_corr_max"`
	// Gaps: sample-gaps when at least GapsPerMin gaps occurred in the last
	// minute, or one gap lasted GapS or longer.
	GapsPerMin int     `mapstructure:"gaps_per_min"`
	GapS       float64 `mapstructure:"gap_s"`
	// Decoder errors: decoder-errors when bad lines and frames are at least
	// ErrorRate of everything decoded over ErrorWindowS, with at least
	// ErrorMinCount of them.
	ErrorRate     float64 `mapstructure:"error_rate"`
	ErrorWindowS  float64 `mapstructure:"error_window_s"`
	ErrorMinCount int     `mapstructure:"error_min_count"`
}

// DefaultDetectorConfig returns the defaults, each with its source.
func DefaultDetectorConfig() DetectorConfig {
	return DetectorConfig{
		AirTrapping: AirTrappingConfig{
			Enabled: true,
			// 4 of 6 breaths: our choice; tolerates one or two breaths
			// disturbed by artefact while keeping onset within 6 breaths.
			N: 4, M: 6,
			// Stay present down to 2 of 6 so that a patient whose trapping
			// sits at the threshold does not make the alarm flicker (our
			// choice).
			ClearN: 2,
			// Once present, count breaths from 0.7 × 1.65 = 1.16 cmH2O:
			// the median of three estimates scatters by about ±0.3 cmH2O
			// around a steady true value (measured on the simulated
			// bronchospasm at a true 1.85 cmH2O: 1.3–2.0), so a patient held
			// near the threshold stays alarmed instead of raising and
			// clearing, while 1.16 stays above the 1 cmH2O under which
			// trapping is taken as absent (docs/sweep.md; our choice).
			ClearFraction: 0.7,
			// Expiratory flow still present at the next breath is the
			// waveform sign of intrinsic PEEP (Nguyen QT, Pastor D, L'Her E,
			// BioMed Eng OnLine 2012;11:32); 3 L/min sits just above the
			// ±2–5 L/min segmentation hysteresis (common practice).
			EEFLPM: 3,
			// Alarm at an intrinsic PEEP of 2 cmH2O: the estimate threshold
			// sits lower (1.65) so that breaths at a true 2 cmH2O are caught
			// despite estimation noise and despite lungs of unequal time
			// constants, whose estimates read the fast units and come out
			// low (medians 8–25 % by lung and mode, about 35 % on the 10×
			// lung at R 40 near the threshold; docs/analysis.md and
			// docs/detectors.md). Measured on the sweep grids
			// (docs/sweep.md): 0 raises below 1 cmH2O in 360 never-trapping
			// patient-hours, where 1.6 raised once at a true 0.97 (our
			// choice).
			PEEPiCmH2O: 1.65,
			// 150 mL: 2 cmH2O in a compliant lung of 75 mL/cmH2O, about 30 %
			// of a 500 mL breath (our choice).
			TrappedML: 150,
			// Three time constants empty 95 % of the volume (1 − e⁻³);
			// "three time constants to empty" is the trade's rule (derived).
			TeOverTauMax: 3,
			// 60 mL over the window: six times the spread of the sum of six
			// breaths' balances with 0.5 L/min of flow noise (our choice,
			// measured on the simulated patients).
			BalanceML: 60,
			// Intrinsic PEEP above 5 cmH2O is commonly treated as clinically
			// important, above 10 as severe (common practice); volumes chosen
			// to match at C ≈ 60 mL/cmH2O (our choice).
			MediumPEEPiCmH2O: 5, HighPEEPiCmH2O: 10,
			MediumTrappedML: 300, HighTrappedML: 600,
			TargetTrappedML: 50,
		},
		RisingPeak: RisingPeakConfig{
			Enabled: true,
			// 2.5 minutes, at most 96 breaths (38 breaths/min): our choice,
			// long enough for the Theil–Sen slope to average out
			// breath-to-breath noise (0.3 cmH2O of noise on a 25 cmH2O peak
			// stays below 1.2 %/min over 12 simulated hours), short enough to
			// fire within 3 minutes of the start of a 2.5 %/min rise.
			WindowS: 150, WindowBreaths: 96, MinBreaths: 12,
			// 25 % over 10 minutes is 2.5 %/min; 1.5 %/min fires early in
			// such a rise (our choice).
			SlopePctPerMin: 1.5, ClearSlopePctPerMin: 0.75, HighSlopePctPerMin: 5,
		},
		Limits: LimitsConfig{
			// Peak pressure alarm limits around 45–50 cmH2O (common practice).
			HighPeak: LimitConfig{Enabled: true, LimitCmH2O: 50, HighMarginCmH2O: 10, HysteresisCmH2O: 2},
			// Plateau ≤ 30 cmH2O: ARDS Network, NEJM 2000;342:1301.
			HighPlateau: LimitConfig{Enabled: true, LimitCmH2O: 30, HighMarginCmH2O: 5, HysteresisCmH2O: 1},
			// Driving pressure 15 cmH2O: common practice after Amato MBP et
			// al., NEJM 2015;372:747.
			HighDriving:          LimitConfig{Enabled: true, LimitCmH2O: 15, HighMarginCmH2O: 5, HysteresisCmH2O: 1},
			EstimateWithoutPause: true,
			MinFitR2:             0.9, // our choice
		},
		Signal: SignalConfig{
			Enabled: true,
			// 5 s without samples is longer than one breath at any rate in
			// use (common practice for loss-of-signal delays is seconds).
			LostAfterS: 5,
			WindowS:    20, // two or more breaths at 6 breaths/min and up (our choice)
			// A breathing patient moves pressure by several cmH2O and flow by
			// tens of L/min; less than 0.2 cmH2O and 0.5 L/min over 20 s is a
			// flat line (our choice).
			FlatPressureCmH2O: 0.2, FlatFlowLPM: 0.5,
			// Physical range: −20…120 cmH2O and ±240 L/min cover any adult
			// ventilation (our choice; set to the sensor's range).
			PressureMinCmH2O: -20, PressureMaxCmH2O: 120, FlowMaxLPM: 240,
			ClipRun: 5, ClipMarginFrac: 0.02,
			// Airway pressure and inspiratory-positive flow are positively
			// correlated over whole breaths (Paw = R·V' + V/C + P0, Bates
			// 2009); clearly negative means the sign is reversed (our choice).
			ReversedCorrMax: -0.3,
			GapsPerMin:      3, GapS: 1,
			ErrorRate: 0.01, ErrorWindowS: 60, ErrorMinCount: 10,
		},
	}
}

// Validate reports every invalid value at once, each prefixed with its full
// key path, e.g. "detectors.air_trapping.n: must be between 1 and m (6)".
func (c *DetectorConfig) Validate(prefix string) []error {
	v := detCheck{prefix: prefix}
	a := &c.AirTrapping
	v.intRange("air_trapping.m", a.M, 1, 64)
	v.intRange("air_trapping.n", a.N, 1, max(a.M, 1), "m")
	v.intRange("air_trapping.clear_n", a.ClearN, 1, max(a.N, 1), "n")
	if !(a.ClearFraction > 0 && a.ClearFraction <= 1) {
		v.errf("air_trapping.clear_fraction", "must be above 0 and at most 1")
	}
	v.positive("air_trapping.eef_lpm", a.EEFLPM)
	v.positive("air_trapping.peepi_cmh2o", a.PEEPiCmH2O)
	v.positive("air_trapping.trapped_ml", a.TrappedML)
	v.positive("air_trapping.te_over_tau_max", a.TeOverTauMax)
	v.positive("air_trapping.balance_ml", a.BalanceML)
	v.positive("air_trapping.medium_peepi_cmh2o", a.MediumPEEPiCmH2O)
	v.atLeast("air_trapping.high_peepi_cmh2o", a.HighPEEPiCmH2O, a.MediumPEEPiCmH2O, "medium_peepi_cmh2o")
	v.positive("air_trapping.medium_trapped_ml", a.MediumTrappedML)
	v.atLeast("air_trapping.high_trapped_ml", a.HighTrappedML, a.MediumTrappedML, "medium_trapped_ml")
	v.positive("air_trapping.target_trapped_ml", a.TargetTrappedML)

	r := &c.RisingPeak
	v.positive("rising_peak_pressure.window_s", r.WindowS)
	v.intRange("rising_peak_pressure.window_breaths", r.WindowBreaths, 3, 1024)
	v.intRange("rising_peak_pressure.min_breaths", r.MinBreaths, 3, max(r.WindowBreaths, 3), "window_breaths")
	v.positive("rising_peak_pressure.slope_pct_per_min", r.SlopePctPerMin)
	if !(r.ClearSlopePctPerMin >= 0 && r.ClearSlopePctPerMin <= r.SlopePctPerMin) {
		v.errf("rising_peak_pressure.clear_slope_pct_per_min", "must be between 0 and slope_pct_per_min (%g)", r.SlopePctPerMin)
	}
	v.atLeast("rising_peak_pressure.high_slope_pct_per_min", r.HighSlopePctPerMin, r.SlopePctPerMin, "slope_pct_per_min")

	for _, l := range []struct {
		key string
		cfg *LimitConfig
	}{{"limits.high_peak_pressure", &c.Limits.HighPeak}, {"limits.high_plateau_pressure", &c.Limits.HighPlateau}, {"limits.high_driving_pressure", &c.Limits.HighDriving}} {
		v.positive(l.key+".limit_cmh2o", l.cfg.LimitCmH2O)
		v.nonNegative(l.key+".high_margin_cmh2o", l.cfg.HighMarginCmH2O)
		v.nonNegative(l.key+".hysteresis_cmh2o", l.cfg.HysteresisCmH2O)
	}
	if !(c.Limits.MinFitR2 >= 0 && c.Limits.MinFitR2 <= 1) {
		v.errf("limits.min_fit_r2", "must be between 0 and 1")
	}

	s := &c.Signal
	v.positive("signal.lost_after_s", s.LostAfterS)
	v.positive("signal.window_s", s.WindowS)
	v.positive("signal.flat_pressure_cmh2o", s.FlatPressureCmH2O)
	v.positive("signal.flat_flow_lpm", s.FlatFlowLPM)
	if !(s.PressureMaxCmH2O > s.PressureMinCmH2O) {
		v.errf("signal.pressure_max_cmh2o", "must be above pressure_min_cmh2o (%g)", s.PressureMinCmH2O)
	}
	v.positive("signal.flow_max_lpm", s.FlowMaxLPM)
	v.intRange("signal.clip_run", s.ClipRun, 2, 100000)
	if !(s.ClipMarginFrac >= 0 && s.ClipMarginFrac < 0.5) {
		v.errf("signal.clip_margin_frac", "must be between 0 and 0.5")
	}
	if !(s.ReversedCorrMax >= -1 && s.ReversedCorrMax <= 0) {
		v.errf("signal.reversed_corr_max", "must be between -1 and 0")
	}
	v.intRange("signal.gaps_per_min", s.GapsPerMin, 1, 100000)
	v.positive("signal.gap_s", s.GapS)
	if !(s.ErrorRate > 0 && s.ErrorRate <= 1) {
		v.errf("signal.error_rate", "must be above 0 and at most 1")
	}
	v.positive("signal.error_window_s", s.ErrorWindowS)
	v.intRange("signal.error_min_count", s.ErrorMinCount, 1, 1<<30)
	return v.errs
}

// detCheck collects configuration errors with their full key path.
type detCheck struct {
	prefix string
	errs   []error
}

func (v *detCheck) errf(key, format string, args ...any) {
	path := key
	if v.prefix != "" {
		path = v.prefix + "." + key
	}
	v.errs = append(v.errs, fmt.Errorf("%s: %s", path, fmt.Sprintf(format, args...)))
}

// intRange checks lo ≤ x ≤ hi; when hiName is given the message names the
// key that sets the upper bound, as in "must be between 1 and m (6)".
func (v *detCheck) intRange(key string, x, lo, hi int, hiName ...string) {
	if x >= lo && x <= hi {
		return
	}
	if len(hiName) > 0 {
		v.errf(key, "must be between %d and %s (%d)", lo, hiName[0], hi)
		return
	}
	v.errf(key, "must be between %d and %d", lo, hi)
}

// positive rejects zero, negative and non-finite values (NaN fails every
// comparison, so it is caught here too).
func (v *detCheck) positive(key string, x float64) {
	if !(x > 0) || x > 1e12 {
		v.errf(key, "must be a positive number")
	}
}

func (v *detCheck) nonNegative(key string, x float64) {
	if !(x >= 0) || x > 1e12 {
		v.errf(key, "must be zero or a positive number")
	}
}

func (v *detCheck) atLeast(key string, x, lo float64, loName string) {
	if !(x >= lo) || x > 1e12 {
		v.errf(key, "must be at least %s (%g)", loName, lo)
	}
}
