package sweep

import (
	"fmt"
	"math"
	"slices"
	"sort"

	"trapline/alerts"
	"trapline/analyze"
)

// Acceptance thresholds of the per-class air-trapping figures (our choice:
// the targets the project holds the detector and estimators to; see
// docs/sweep.md).
const (
	// SettleBreaths: breaths of an episode before the 7th are not counted
	// in SensitivitySettled (the N-of-M rule needs them to decide).
	SettleBreaths = 6
	// PEEPiTolCmH2O is the tolerance of PEEPiWithin.
	PEEPiTolCmH2O = 1.0
	// HoldVisibleCmH2O is the true intrinsic PEEP from which a hold must
	// be recognised: below it the pressure hardly rises in the hold, and
	// the analyzer takes it for an open valve (a lung that had emptied),
	// which reads the same near-zero value.
	HoldVisibleCmH2O = 0.5
)

// ClassScore holds the air-trapping figures of one class of patients: the
// patients that share one value of one grid dimension (a model, a setting,
// a sensor, a resistance, a sample rate).
type ClassScore struct {
	// Class is "dimension=value", e.g. "setting=pc-rise0.3".
	Class        string `json:"class"`
	Patients     int    `json:"patients"`
	PatientHours Num    `json:"patient_hours"`
	// SensitivitySettled is the fraction of breaths with a true intrinsic
	// PEEP ≥ 2 cmH2O, from the 7th breath of their episode on, at whose end
	// the air-trapping alarm was active.
	SensitivitySettled Num `json:"sensitivity_settled"`
	SettledBreaths     int `json:"settled_breaths"`
	// Episodes counts positive episodes; Unalarmed those never alarmed.
	Episodes  int `json:"episodes"`
	Unalarmed int `json:"unalarmed"`
	// OnsetMaxBreaths is the longest onset, in breaths from the first
	// breath with a true intrinsic PEEP ≥ 2 cmH2O to the raise; OnsetOver6
	// counts onsets longer than 6 breaths.
	OnsetMaxBreaths Num `json:"onset_max_breaths"`
	OnsetOver6      int `json:"onset_over_6"`
	// FalseRaises counts raises whose alarm never overlapped a trapping
	// breath nor a grey-zone one (true intrinsic PEEP ≥ GreyZoneCmH2O);
	// GreyRaises counts those that overlapped only grey-zone breaths.
	// NonTrappingHours is the time of patients whose true intrinsic PEEP
	// stayed below GreyZoneCmH2O throughout.
	FalseRaises      int `json:"false_raises"`
	GreyRaises       int `json:"grey_raises"`
	NonTrappingHours Num `json:"non_trapping_hours"`
	// PEEPiWithin is the fraction of matched breaths whose intrinsic PEEP
	// estimate is within ±1 cmH2O of the truth, or, when the record flags
	// it a lower bound, at most 1 cmH2O above the truth and not below half
	// of it (an honest bound). PEEPiBound counts the bound breaths.
	PEEPiWithin Num `json:"peepi_within_1cmh2o"`
	PEEPiN      int `json:"peepi_n"`
	PEEPiBound  int `json:"peepi_bound"`
	// Holds are the end-expiratory hold figures, nil when the class had
	// neither a hold nor a breath taken for one.
	Holds *HoldScore `json:"holds,omitempty"`
	// RMedianRelPct and CMedianRelPct are the medians of the relative
	// errors of R and C.
	RMedianRelPct Num `json:"r_median_rel_pct"`
	CMedianRelPct Num `json:"c_median_rel_pct"`

	settled, settledHit int
	peepiOK             int
	rRel, cRel          []float64
}

// HoldScore holds the end-expiratory hold figures of a class (grids with
// exp_holds): N counts the passive breaths that truly ended in a hold,
// Within is PEEPiWithin over them, Missed counts those with a true
// intrinsic PEEP of at least HoldVisibleCmH2O whose record was not flagged
// exp-hold, False the records flagged exp-hold whose breath had no hold,
// and Unsettled those flagged hold-unsettled.
type HoldScore struct {
	N         int `json:"n"`
	Within    Num `json:"within_1cmh2o"`
	Missed    int `json:"missed"`
	False     int `json:"false"`
	Unsettled int `json:"unsettled"`

	ok int
}

// holds returns the class's hold figures, made on first use.
func (cs *ClassScore) holds() *HoldScore {
	if cs.Holds == nil {
		cs.Holds = &HoldScore{}
	}
	return cs.Holds
}

// caseClasses names the classes a case belongs to.
func caseClasses(c *Case) []string {
	out := []string{"all", "model=" + c.Model, fmt.Sprintf("rate=%gHz", c.SampleRateHz)}
	if c.Model == ModelScenario {
		return append(out, "scenario="+c.Scenario)
	}
	out = append(out, "setting="+c.Setting, "noise="+c.Noise, fmt.Sprintf("r=%g", c.RCmH2OSPerL))
	if c.Model == ModelLinear {
		// The estimator targets on linear lungs are per sensor.
		out = append(out, "linear/noise="+c.Noise)
	}
	return out
}

// classScores computes the per-class figures of detector set si.
func classScores(r *Result, si int) []ClassScore {
	ci := slices.Index(Scored(), analyze.CondAirTrapping)
	byName := map[string]*ClassScore{}
	var order []string
	ep := r.Plan.Grid.Episodes
	for i := range r.Cases {
		c := &r.Cases[i]
		var one ConditionScore
		one.Condition = analyze.CondAirTrapping
		caseScore(c.Truth, c.Alerts[si], ci, ep, &one)
		trapped := slices.ContainsFunc(c.Truth, func(t TruthBreath) bool { return t.Has(ci) }) ||
			greyZone(Scored()[ci], c.Truth)
		settled, hit := settledCounts(c.Truth, c.Alerts[si], ci, ep)
		for _, name := range caseClasses(c.Case) {
			cs := byName[name]
			if cs == nil {
				cs = &ClassScore{Class: name, OnsetMaxBreaths: Num(math.NaN())}
				byName[name] = cs
				order = append(order, name)
			}
			cs.Patients++
			cs.PatientHours += Num(c.Case.DurationS / 3600)
			if !trapped {
				cs.NonTrappingHours += Num(c.Case.DurationS / 3600)
			}
			cs.settled += settled
			cs.settledHit += hit
			cs.Episodes += one.Episode.Positive
			cs.Unalarmed += one.Episode.Positive - one.Episode.Detected
			cs.FalseRaises += one.FalseAlerts
			cs.GreyRaises += one.GreyAlerts
			for _, b := range one.onsetBreaths {
				if b > SettleBreaths {
					cs.OnsetOver6++
				}
				if math.IsNaN(float64(cs.OnsetMaxBreaths)) || Num(b) > cs.OnsetMaxBreaths {
					cs.OnsetMaxBreaths = Num(b)
				}
			}
			cs.addEstimates(c)
		}
	}
	sort.SliceStable(order, func(a, b int) bool { return order[a] < order[b] })
	out := make([]ClassScore, 0, len(order))
	for _, name := range order {
		cs := byName[name]
		cs.SensitivitySettled = ratio(cs.settledHit, cs.settled)
		cs.SettledBreaths = cs.settled
		cs.PEEPiWithin = ratio(cs.peepiOK, cs.PEEPiN)
		if h := cs.Holds; h != nil {
			h.Within = ratio(h.ok, h.N)
		}
		cs.RMedianRelPct, cs.CMedianRelPct = quantile(cs.rRel, 0.5), quantile(cs.cRel, 0.5)
		out = append(out, *cs)
	}
	return out
}

// addEstimates adds the estimator figures of one case.
func (cs *ClassScore) addEstimates(c *CaseResult) {
	for k := range c.Estimates {
		e := &c.Estimates[k]
		t := &c.Truth[e.Truth]
		if est := float64(e.PEEPiCmH2O); !math.IsNaN(est) && t.Passive {
			cs.PEEPiN++
			d := est - t.PEEPiCmH2O
			ok := math.Abs(d) <= PEEPiTolCmH2O
			if e.PEEPiBound {
				cs.PEEPiBound++
				ok = ok || (d <= PEEPiTolCmH2O && est >= t.PEEPiCmH2O/2)
			}
			if ok {
				cs.peepiOK++
			}
			if t.Hold {
				h := cs.holds()
				h.N++
				if !e.Hold && t.PEEPiCmH2O >= HoldVisibleCmH2O {
					h.Missed++
				}
				if e.HoldUnsettled {
					h.Unsettled++
				}
				if ok {
					h.ok++
				}
			}
		}
		if e.Hold && !t.Hold {
			cs.holds().False++
		}
		if v := float64(e.RCmH2OSPerL); !math.IsNaN(v) && t.RCmH2OSPerL > 0 {
			cs.rRel = append(cs.rRel, 100*math.Abs(v-t.RCmH2OSPerL)/t.RCmH2OSPerL)
		}
		if v := float64(e.CMLPerCmH2O); !math.IsNaN(v) && t.CMLPerCmH2O > 0 {
			cs.cRel = append(cs.cRel, 100*math.Abs(v-t.CMLPerCmH2O)/t.CMLPerCmH2O)
		}
	}
}

// settledCounts returns how many breaths of the case truly have condition
// ci from the 7th breath of their episode on, and at how many of them the
// alarm was active.
func settledCounts(truth []TruthBreath, events []AlertEvent, ci int, ep Episodes) (n, hit int) {
	act := activeAtBreaths(truth, events, Scored()[ci], ep)
	run := 0
	for i := range truth {
		if !truth[i].Has(ci) {
			run = 0
			continue
		}
		run++
		if run <= SettleBreaths {
			continue
		}
		n++
		if act[i] {
			hit++
		}
	}
	return n, hit
}

// activeAtBreaths tells, for each breath, whether the alarm of cond was
// active at its end (events up to its end plus the matching tolerance).
func activeAtBreaths(truth []TruthBreath, events []AlertEvent, cond string, ep Episodes) []bool {
	var ev []AlertEvent
	for _, e := range events {
		if e.Condition == cond {
			ev = append(ev, e)
		}
	}
	sort.SliceStable(ev, func(a, b int) bool { return ev[a].TS < ev[b].TS })
	act := make([]bool, len(truth))
	active := false
	j := 0
	for i := range truth {
		for lim := truth[i].EndS + ep.MatchTolS; j < len(ev) && ev[j].TS <= lim; j++ {
			active = ev[j].State != string(alerts.Cleared)
		}
		act[i] = active
	}
	return act
}
