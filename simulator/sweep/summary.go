package sweep

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"sort"
)

// SummarySchema is the version of the JSON summary.
const SummarySchema = 1

// Summary is the machine-readable result of a sweep (sweep-summary.json).
type Summary struct {
	Type   string `json:"type"` // always "sweep-summary"
	Schema int    `json:"schema"`
	// Patients counts the simulated patients; PatientHours their
	// simulated time.
	Patients         int   `json:"patients"`
	PatientHours     Num   `json:"patient_hours"`
	Samples          int64 `json:"samples"`
	BreathsSimulated int   `json:"breaths_simulated"`
	BreathsAnalysed  int   `json:"breaths_analysed"`
	// BreathsUnmatched counts analysed breaths that matched no simulated
	// breath (a split or merged breath).
	BreathsUnmatched int `json:"breaths_unmatched"`
	// ElapsedS is the wall time of the simulations on Workers workers;
	// RealtimeFactor is simulated time over wall time.
	ElapsedS       Num       `json:"elapsed_s"`
	Workers        int       `json:"workers"`
	RealtimeFactor Num       `json:"realtime_factor"`
	SampleRatesHz  []float64 `json:"sample_rates_hz"`
	Models         []string  `json:"models"`
	Episodes       Episodes  `json:"episodes"`
	// Sets holds the scores of each detector set.
	Sets []SetSummary `json:"sets"`
	// Estimators holds the error distributions of the estimates against
	// the truth, by patient model.
	Estimators []EstimatorError `json:"estimators"`
	// ErrorVsR and ErrorVsC are the relative errors of the R, C and τ
	// estimates as functions of the true R and C, by model.
	ErrorVsR []ErrorCurve `json:"error_vs_r"`
	ErrorVsC []ErrorCurve `json:"error_vs_c"`
}

// SetSummary holds the scores of one detector set.
type SetSummary struct {
	Name string `json:"name"`
	// Conditions are the scores over every patient: the headline figures.
	Conditions []ConditionScore `json:"conditions"`
	// ByModel holds the same scores for each patient model.
	ByModel []ModelScores `json:"by_model"`
	// BySampleRate holds them for each sample rate, when the grid has
	// more than one.
	BySampleRate []RateScores `json:"by_sample_rate,omitempty"`
	// OtherAlerts counts fresh raises of conditions without ground truth
	// (all of them are unexpected on simulated patients), per hour.
	OtherAlerts map[string]int `json:"other_alerts"`
	// Classes holds the air-trapping acceptance figures of every class of
	// patients (one value of one grid dimension), "all" first.
	Classes []ClassScore `json:"classes"`
}

// ModelScores holds the scores over the patients of one model.
type ModelScores struct {
	Model        string           `json:"model"`
	PatientHours Num              `json:"patient_hours"`
	Conditions   []ConditionScore `json:"conditions"`
}

// RateScores holds the scores over the patients at one sample rate.
type RateScores struct {
	SampleRateHz float64          `json:"sample_rate_hz"`
	PatientHours Num              `json:"patient_hours"`
	Conditions   []ConditionScore `json:"conditions"`
}

// EstimatorError is the distribution of estimate − truth for one quantity
// over the breaths of one patient model.
type EstimatorError struct {
	Model    string `json:"model"`
	Quantity string `json:"quantity"`
	// N counts breaths with an estimate; Missing those without one (null).
	N       int `json:"n"`
	Missing int `json:"missing"`
	// Bias, MAE, RMSE, Median, P05, P95 are in the quantity's unit.
	Bias   Num `json:"bias"`
	MAE    Num `json:"mae"`
	RMSE   Num `json:"rmse"`
	Median Num `json:"median"`
	P05    Num `json:"p05"`
	P95    Num `json:"p95"`
	// MedianRelPct and the 5th/95th percentiles of the relative error, in
	// percent of the true value (R, C and τ only).
	MedianRelPct Num `json:"median_rel_pct"`
	P05RelPct    Num `json:"p05_rel_pct"`
	P95RelPct    Num `json:"p95_rel_pct"`
}

// ErrorCurve is the relative error of one estimate over bins of a true
// quantity, for one model.
type ErrorCurve struct {
	Model    string     `json:"model"`
	Quantity string     `json:"quantity"`
	Over     string     `json:"over"`
	Bins     []ErrorBin `json:"bins"`
}

// ErrorBin summarises relative errors (percent) of breaths whose true
// value lies in [Lo, Hi).
type ErrorBin struct {
	Lo           Num `json:"lo"`
	Hi           Num `json:"hi"`
	N            int `json:"n"`
	MedianRelPct Num `json:"median_rel_pct"`
	P25RelPct    Num `json:"p25_rel_pct"`
	P75RelPct    Num `json:"p75_rel_pct"`
}

// Estimated quantities, in summary order.
var estQuantities = []struct {
	name     string
	relative bool
	est      func(*Estimate) float64
	truth    func(*TruthBreath) float64
}{
	{"r_cmh2o_s_per_l", true, func(e *Estimate) float64 { return float64(e.RCmH2OSPerL) }, func(t *TruthBreath) float64 { return t.RCmH2OSPerL }},
	{"c_ml_per_cmh2o", true, func(e *Estimate) float64 { return float64(e.CMLPerCmH2O) }, func(t *TruthBreath) float64 { return t.CMLPerCmH2O }},
	{"tau_s", true, func(e *Estimate) float64 { return float64(e.TauS) }, func(t *TruthBreath) float64 { return t.TauS }},
	{"trapped_ml", false, func(e *Estimate) float64 { return float64(e.TrappedML) }, func(t *TruthBreath) float64 { return t.TrappedML }},
	{"peepi_cmh2o", false, func(e *Estimate) float64 { return float64(e.PEEPiCmH2O) }, func(t *TruthBreath) float64 { return t.PEEPiCmH2O }},
}

var (
	rEdges = []float64{0, 10, 15, 20, 30, 40, 55, 80, 1000}
	cEdges = []float64{0, 20, 30, 40, 55, 70, 90, 130, 1000}
)

// models returns the models present in the plan, in report order.
func (r *Result) models() []string {
	var out []string
	for _, m := range append(Models(), ModelScenario) {
		for i := range r.Plan.Cases {
			if r.Plan.Cases[i].Model == m {
				out = append(out, m)
				break
			}
		}
	}
	return out
}

// Summarize scores the raw results.
func Summarize(r *Result) *Summary {
	s := &Summary{Type: "sweep-summary", Schema: SummarySchema, Patients: len(r.Cases),
		Workers: r.Workers, SampleRatesHz: r.Plan.Grid.SampleRatesHz, Models: r.models(), Episodes: r.Plan.Grid.Episodes}
	hours, hoursBy, hoursByRate := s.countCases(r)
	s.PatientHours = Num(hours)
	s.ElapsedS = Num(r.Elapsed.Seconds())
	s.RealtimeFactor = Num(math.NaN())
	if r.Elapsed > 0 {
		s.RealtimeFactor = Num(hours * 3600 / r.Elapsed.Seconds())
	}
	ep := r.Plan.Grid.Episodes
	scored := Scored()
	for si := range r.Sets {
		ss := SetSummary{Name: r.Sets[si].Name, OtherAlerts: map[string]int{}}
		all := make([]ConditionScore, len(scored))
		by := make([][]ConditionScore, len(s.Models))
		for m := range by {
			by[m] = make([]ConditionScore, len(scored))
		}
		rates := s.SampleRatesHz
		if len(rates) < 2 {
			rates = nil // one rate: the overall scores say it all
		}
		byRate := make([][]ConditionScore, len(rates))
		for k := range byRate {
			byRate[k] = make([]ConditionScore, len(scored))
		}
		for i := range r.Cases {
			c := &r.Cases[i]
			mi := slices.Index(s.Models, c.Case.Model)
			ri := slices.Index(rates, c.Case.SampleRateHz)
			for ci := range scored {
				all[ci].Condition, by[mi][ci].Condition = scored[ci], scored[ci]
				caseScore(c.Truth, c.Alerts[si], ci, ep, &all[ci])
				caseScore(c.Truth, c.Alerts[si], ci, ep, &by[mi][ci])
				if ri >= 0 {
					byRate[ri][ci].Condition = scored[ci]
					caseScore(c.Truth, c.Alerts[si], ci, ep, &byRate[ri][ci])
				}
			}
			for _, e := range c.Alerts[si] {
				if e.Fresh && !slices.Contains(scored, e.Condition) {
					ss.OtherAlerts[e.Condition]++
				}
			}
		}
		for ci := range all {
			all[ci].finish(hours)
		}
		ss.Conditions = all
		for mi, m := range s.Models {
			for ci := range by[mi] {
				by[mi][ci].finish(hoursBy[m])
			}
			ss.ByModel = append(ss.ByModel, ModelScores{Model: m, PatientHours: Num(hoursBy[m]), Conditions: by[mi]})
		}
		for ri, hz := range rates {
			for ci := range byRate[ri] {
				byRate[ri][ci].finish(hoursByRate[hz])
			}
			ss.BySampleRate = append(ss.BySampleRate, RateScores{SampleRateHz: hz, PatientHours: Num(hoursByRate[hz]), Conditions: byRate[ri]})
		}
		ss.Classes = classScores(r, si)
		s.Sets = append(s.Sets, ss)
	}
	s.Estimators, s.ErrorVsR, s.ErrorVsC = estimatorErrors(r, s.Models)
	return s
}

// countCases adds up the samples and breaths of every case into s and
// returns the simulated patient-hours in all, by model and by sample rate.
func (s *Summary) countCases(r *Result) (hours float64, byModel map[string]float64, byRate map[float64]float64) {
	byModel, byRate = map[string]float64{}, map[float64]float64{}
	for i := range r.Cases {
		c := &r.Cases[i]
		h := c.Case.DurationS / 3600
		hours += h
		byModel[c.Case.Model] += h
		byRate[c.Case.SampleRateHz] += h
		s.Samples += c.Samples
		s.BreathsSimulated += len(c.Truth)
		s.BreathsAnalysed += c.Breaths
		s.BreathsUnmatched += c.Unmatched
	}
	return hours, byModel, byRate
}

func estimatorErrors(r *Result, models []string) (errs []EstimatorError, vsR, vsC []ErrorCurve) {
	for _, m := range models {
		for qi, q := range estQuantities {
			ee := EstimatorError{Model: m, Quantity: q.name}
			var abs, rel []float64
			// Relative errors binned by true R and true C.
			binR := make([][]float64, len(rEdges)-1)
			binC := make([][]float64, len(cEdges)-1)
			for i := range r.Cases {
				c := &r.Cases[i]
				if c.Case.Model != m {
					continue
				}
				for k := range c.Estimates {
					e := &c.Estimates[k]
					t := &c.Truth[e.Truth]
					est, tru := q.est(e), q.truth(t)
					if math.IsNaN(est) || math.IsInf(est, 0) {
						ee.Missing++
						continue
					}
					abs = append(abs, est-tru)
					if q.relative && tru != 0 {
						re := 100 * (est - tru) / tru
						rel = append(rel, re)
						if qi < 2 { // R and C
							if b := bin(rEdges, t.RCmH2OSPerL); b >= 0 && qi == 0 {
								binR[b] = append(binR[b], re)
							}
							if b := bin(cEdges, t.CMLPerCmH2O); b >= 0 && qi == 1 {
								binC[b] = append(binC[b], re)
							}
						}
					}
				}
			}
			ee.N = len(abs)
			var sum, sumAbs, sumSq float64
			for _, x := range abs {
				sum += x
				sumAbs += math.Abs(x)
				sumSq += x * x
			}
			nan := Num(math.NaN())
			ee.Bias, ee.MAE, ee.RMSE = nan, nan, nan
			if ee.N > 0 {
				n := float64(ee.N)
				ee.Bias, ee.MAE, ee.RMSE = Num(sum/n), Num(sumAbs/n), Num(math.Sqrt(sumSq/n))
			}
			ee.Median, ee.P05, ee.P95 = quantile(abs, 0.5), quantile(abs, 0.05), quantile(abs, 0.95)
			ee.MedianRelPct, ee.P05RelPct, ee.P95RelPct = quantile(rel, 0.5), quantile(rel, 0.05), quantile(rel, 0.95)
			errs = append(errs, ee)
			if qi == 0 {
				vsR = append(vsR, errorCurve(m, q.name, "r_cmh2o_s_per_l", rEdges, binR))
			}
			if qi == 1 {
				vsC = append(vsC, errorCurve(m, q.name, "c_ml_per_cmh2o", cEdges, binC))
			}
		}
	}
	return errs, vsR, vsC
}

func errorCurve(model, quantity, over string, edges []float64, bins [][]float64) ErrorCurve {
	ec := ErrorCurve{Model: model, Quantity: quantity, Over: over}
	for i, xs := range bins {
		ec.Bins = append(ec.Bins, ErrorBin{Lo: Num(edges[i]), Hi: Num(edges[i+1]), N: len(xs),
			MedianRelPct: quantile(xs, 0.5), P25RelPct: quantile(xs, 0.25), P75RelPct: quantile(xs, 0.75)})
	}
	return ec
}

// bin returns the index of the bin [edges[i], edges[i+1]) holding v, or -1.
func bin(edges []float64, v float64) int {
	i := sort.SearchFloat64s(edges, v)
	if i < len(edges) && edges[i] == v {
		i++
	}
	if i < 1 || i >= len(edges) {
		return -1
	}
	return i - 1
}

// JSON encodes the summary, indented.
func (s *Summary) JSON() ([]byte, error) {
	b, err := json.MarshalIndent(s, "", "  ")
	if err != nil {
		return nil, fmt.Errorf("encode sweep summary: %w", err)
	}
	return append(b, '\n'), nil
}
