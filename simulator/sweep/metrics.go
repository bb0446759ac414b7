package sweep

import (
	"encoding/json"
	"math"
	"slices"
	"sort"
	"strconv"

	"trapline/alerts"
	"trapline/analyze"
)

// Num is a number that is null in JSON when it is not finite (an
// undefined ratio, an empty distribution).
type Num float64

// MarshalJSON writes null for NaN and infinities.
func (n Num) MarshalJSON() ([]byte, error) {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return []byte("null"), nil
	}
	return strconv.AppendFloat(nil, f, 'g', 6, 64), nil
}

// UnmarshalJSON reads a number or null (NaN).
func (n *Num) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*n = Num(math.NaN())
		return nil
	}
	var f float64
	if err := json.Unmarshal(b, &f); err != nil {
		return err
	}
	*n = Num(f)
	return nil
}

func ratio(a, b int) Num {
	if b == 0 {
		return Num(math.NaN())
	}
	return Num(float64(a) / float64(b))
}

// BreathCounts is the per-breath confusion matrix of one condition: a
// breath is positive when it truly has the condition, and alarmed when an
// alarm of the condition is active at its end (see docs/sweep.md).
type BreathCounts struct {
	TP          int `json:"tp"`
	FN          int `json:"fn"`
	FP          int `json:"fp"`
	TN          int `json:"tn"`
	Sensitivity Num `json:"sensitivity"`
	Specificity Num `json:"specificity"`
}

// EpisodeCounts counts episodes: runs of at least Episodes.MinBreaths
// breaths with (positive) or without (negative) the condition.
type EpisodeCounts struct {
	Positive int `json:"positive"`
	// Detected positive episodes had the alarm active on one of their
	// breaths (or within the grace breaths after).
	Detected int `json:"detected"`
	Negative int `json:"negative"`
	// Clean negative episodes saw no alarm raised during them.
	Clean       int `json:"clean"`
	Sensitivity Num `json:"sensitivity"`
	Specificity Num `json:"specificity"`
}

// Latency summarises a latency distribution in seconds.
type Latency struct {
	N       int `json:"n"`
	MedianS Num `json:"median_s"`
	P10S    Num `json:"p10_s"`
	P90S    Num `json:"p90_s"`
	// MedianBreaths is the median in breaths (onset only).
	MedianBreaths Num `json:"median_breaths,omitempty"`
	// Censored counts episodes whose alarm had not changed by the time the
	// next episode began or the run ended (clearing only), or that were
	// already alarmed when they began (onset only).
	Censored int `json:"censored"`
}

// CurveBin is the fraction of breaths with the alarm active among breaths
// whose true quantity lies in [Lo, Hi).
type CurveBin struct {
	Lo      Num `json:"lo"`
	Hi      Num `json:"hi"`
	Breaths int `json:"breaths"`
	Alarmed int `json:"alarmed"`
	// Fraction is Alarmed / Breaths.
	Fraction Num `json:"fraction"`
}

// ConditionScore is the score of one condition under one detector set,
// over one group of patients.
type ConditionScore struct {
	Condition string        `json:"condition"`
	Breath    BreathCounts  `json:"breath"`
	Episode   EpisodeCounts `json:"episode"`
	// Alerts counts fresh raises; FalseAlerts those whose alarm never
	// overlapped a breath with the condition.
	Alerts      int `json:"alerts"`
	FalseAlerts int `json:"false_alerts"`
	// GreyAlerts counts, for air trapping, raises whose alarm overlapped
	// no breath with the condition but a breath in the grey zone (true
	// intrinsic PEEP from GreyZoneCmH2O up to the label's 2 cmH2O); they
	// are not in FalseAlerts. A detector threshold under the label's
	// threshold cannot separate 1.8 from 2.0 cmH2O under sensor noise, so
	// such a raise is neither a miss of the definition nor a false alarm.
	GreyAlerts         int     `json:"grey_alerts"`
	FalseAlertsPerHour Num     `json:"false_alerts_per_hour"`
	Onset              Latency `json:"onset"`
	Clearing           Latency `json:"clearing"`
	// Quantity names the true quantity of Curve, e.g. "peepi_cmh2o".
	Quantity string     `json:"quantity,omitempty"`
	Curve    []CurveBin `json:"curve,omitempty"`

	onsetS, onsetBreaths, clearS []float64
	// onsetQ is the median true quantity (Quantity) of the episode of each
	// onset latency, for latency against the true value.
	onsetQ []float64
}

// curveSpec ties a condition to the true quantity its detection curve is
// drawn over, with bin edges (our choice: finer near the thresholds).
type curveSpec struct {
	quantity string
	value    func(*TruthBreath) float64
	edges    []float64
	// threshold is the true value that defines the condition.
	threshold float64
}

func curveFor(cond string) *curveSpec {
	switch cond {
	case analyze.CondAirTrapping:
		return &curveSpec{"peepi_cmh2o", func(t *TruthBreath) float64 { return t.PEEPiCmH2O },
			[]float64{0, 0.5, 1, 1.5, 2, 2.5, 3, 4, 5, 7, 10, 15}, 2}
	case analyze.CondHighPlateauPressure:
		return &curveSpec{"pplat_cmh2o", func(t *TruthBreath) float64 { return t.PlateauCmH2O },
			[]float64{10, 15, 20, 25, 28, 30, 32, 35, 40, 50}, 30}
	case analyze.CondHighDrivingPressure:
		return &curveSpec{"dp_cmh2o", func(t *TruthBreath) float64 { return t.DrivingCmH2O },
			[]float64{0, 5, 10, 12, 14, 15, 16, 18, 20, 25, 30, 40}, 15}
	case analyze.CondHighPeakPressure:
		return &curveSpec{"pip_cmh2o", func(t *TruthBreath) float64 { return t.PeakCmH2O },
			[]float64{10, 20, 30, 40, 45, 50, 55, 60, 70, 90}, 50}
	}
	return nil
}

// caseScore scores one condition (index ci of Scored) of one case under
// one detector set. It uses the truth labels and the alert events only.
func caseScore(truth []TruthBreath, events []AlertEvent, ci int, ep Episodes, sc *ConditionScore) {
	cond := Scored()[ci]
	at := trackAlarms(truth, events, cond, ep)
	cs := curveFor(cond)
	scoreBreaths(truth, at.act, ci, cs, sc)
	scoreEpisodes(truth, &at, ci, cs, ep, sc)
	scoreAlerts(truth, &at, cond, ci, ep, sc)
}

// alarmRaise is a fresh raise of an alarm, attributed to a breath.
type alarmRaise struct {
	breath int
	tS     float64
}

// alarmTrack is the alarm of one condition seen breath by breath.
type alarmTrack struct {
	act     []bool       // the alarm was on at the end of breath i (plus the match tolerance)
	raises  []alarmRaise // fresh raises, in time order
	clearTS []float64    // time of the event that ended the alarm at breath i
}

// trackAlarms follows the alert events of condition cond over the truth
// breaths: an event belongs to the first breath ending no earlier than
// the event less ep.MatchTolS, events after the last breath to the last.
func trackAlarms(truth []TruthBreath, events []AlertEvent, cond string, ep Episodes) alarmTrack {
	var ev []AlertEvent
	for _, e := range events {
		if e.Condition == cond {
			ev = append(ev, e)
		}
	}
	sort.SliceStable(ev, func(a, b int) bool { return ev[a].TS < ev[b].TS })
	n := len(truth)
	act := make([]bool, n)
	var raises []alarmRaise
	clearTS := make([]float64, n)
	active := false
	j := 0
	for i := range truth {
		lim := truth[i].EndS + ep.MatchTolS
		for ; j < len(ev) && ev[j].TS <= lim; j++ {
			if ev[j].State == string(alerts.Cleared) {
				if active {
					clearTS[i] = ev[j].TS
				}
				active = false
				continue
			}
			if ev[j].Fresh {
				raises = append(raises, alarmRaise{i, ev[j].TS})
			}
			active = true
		}
		act[i] = active
	}
	for ; j < len(ev); j++ { // after the last breath: attributed to it
		if ev[j].Fresh && n > 0 {
			raises = append(raises, alarmRaise{n - 1, ev[j].TS})
		}
	}
	return alarmTrack{act: act, raises: raises, clearTS: clearTS}
}

// scoreBreaths counts the breaths of condition ci by truth and alarm state
// (act), and fills the detection curve of quantity cs when there is one.
func scoreBreaths(truth []TruthBreath, act []bool, ci int, cs *curveSpec, sc *ConditionScore) {
	if cs != nil && sc.Curve == nil {
		sc.Quantity = cs.quantity
		for k := 0; k+1 < len(cs.edges); k++ {
			sc.Curve = append(sc.Curve, CurveBin{Lo: Num(cs.edges[k]), Hi: Num(cs.edges[k+1])})
		}
	}
	for i := range truth {
		pos := truth[i].Has(ci)
		switch {
		case pos && act[i]:
			sc.Breath.TP++
		case pos:
			sc.Breath.FN++
		case act[i]:
			sc.Breath.FP++
		default:
			sc.Breath.TN++
		}
		if cs != nil {
			if k := bin(cs.edges, cs.value(&truth[i])); k >= 0 {
				sc.Curve[k].Breaths++
				if act[i] {
					sc.Curve[k].Alarmed++
				}
			}
		}
	}
}

// scoreEpisodes finds the runs of breaths with and without condition ci
// and scores those of at least ep.MinBreaths: detection, onset and
// clearing latency of positive runs, and whether negative runs stay clean.
func scoreEpisodes(truth []TruthBreath, at *alarmTrack, ci int, cs *curveSpec, ep Episodes, sc *ConditionScore) {
	act, raises, clearTS := at.act, at.raises, at.clearTS
	n := len(truth)
	for a := 0; a < n; {
		b := a
		for b+1 < n && truth[b+1].Has(ci) == truth[a].Has(ci) {
			b++
		}
		long := b-a+1 >= ep.MinBreaths
		if truth[a].Has(ci) && long {
			sc.Episode.Positive++
			end := min(b+ep.GraceBreaths, n-1)
			if slices.Contains(act[a:end+1], true) {
				sc.Episode.Detected++
			}
			// Onset: the first fresh raise within the episode (and grace).
			if a > 0 && act[a-1] {
				sc.Onset.Censored++
			} else {
				for _, r := range raises {
					if r.breath >= a && r.breath <= end {
						sc.onsetS = append(sc.onsetS, r.tS-truth[a].EndS)
						sc.onsetBreaths = append(sc.onsetBreaths, float64(r.breath-a))
						if cs != nil {
							qs := make([]float64, 0, b-a+1)
							for k := a; k <= b; k++ {
								qs = append(qs, cs.value(&truth[k]))
							}
							sc.onsetQ = append(sc.onsetQ, float64(quantile(qs, 0.5)))
						}
						break
					}
				}
			}
			// Clearing: from the end of the last breath with the condition
			// to the clearing event, unless the condition comes back or the
			// run ends first. An alarm that cleared during that last breath
			// (a signal that came back mid-breath) has a latency ≤ 0.
			switch {
			case act[b] && b+1 < n:
				cleared := false
				for k := b + 1; k < n && !truth[k].Has(ci); k++ {
					if !act[k] {
						sc.clearS = append(sc.clearS, clearTS[k]-truth[b].EndS)
						cleared = true
						break
					}
				}
				if !cleared {
					sc.Clearing.Censored++
				}
			case act[b]:
				sc.Clearing.Censored++
			case b > a && act[b-1]:
				sc.clearS = append(sc.clearS, clearTS[b]-truth[b].EndS)
			}
		}
		if !truth[a].Has(ci) && long {
			sc.Episode.Negative++
			clean := true
			for _, r := range raises {
				if r.breath >= a && r.breath <= b {
					clean = false
					break
				}
			}
			if clean {
				sc.Episode.Clean++
			}
		}
		a = b + 1
	}
}

// scoreAlerts sorts the fresh raises into true, grey-zone and false alerts.
func scoreAlerts(truth []TruthBreath, at *alarmTrack, cond string, ci int, ep Episodes, sc *ConditionScore) {
	act, raises := at.act, at.raises
	n := len(truth)
	// False alerts: fresh raises whose alarm span (extended back by the
	// grace breaths) has no breath with the condition.
	for _, r := range raises {
		sc.Alerts++
		end := r.breath
		for end+1 < n && act[end+1] {
			end++
		}
		hit := false
		for k := max(r.breath-ep.GraceBreaths, 0); k <= end && k < n; k++ {
			if truth[k].Has(ci) {
				hit = true
				break
			}
		}
		switch {
		case hit:
		case greyZone(cond, truth[max(r.breath-ep.GraceBreaths, 0):min(end+1, n)]):
			sc.GreyAlerts++
		default:
			sc.FalseAlerts++
		}
	}
}

// GreyZoneCmH2O is the lower edge of the grey zone of air trapping (our
// choice): a breath with a true intrinsic PEEP from here up to the label's
// threshold is neither trapping nor clearly free of it. A patient counts
// as never trapping only when every breath stays below it.
const GreyZoneCmH2O = 1.0

// greyZone reports whether, for air trapping, any of the breaths has a
// true intrinsic PEEP of at least GreyZoneCmH2O.
func greyZone(cond string, breaths []TruthBreath) bool {
	if cond != analyze.CondAirTrapping {
		return false
	}
	for i := range breaths {
		if breaths[i].PEEPiCmH2O >= GreyZoneCmH2O {
			return true
		}
	}
	return false
}

// finish computes the ratios and distribution summaries.
func (sc *ConditionScore) finish(hours float64) {
	b := &sc.Breath
	b.Sensitivity, b.Specificity = ratio(b.TP, b.TP+b.FN), ratio(b.TN, b.TN+b.FP)
	e := &sc.Episode
	e.Sensitivity, e.Specificity = ratio(e.Detected, e.Positive), ratio(e.Clean, e.Negative)
	sc.FalseAlertsPerHour = Num(math.NaN())
	if hours > 0 {
		sc.FalseAlertsPerHour = Num(float64(sc.FalseAlerts) / hours)
	}
	sc.Onset.N = len(sc.onsetS)
	on := slices.Clone(sc.onsetS) // quantile sorts; onsetS stays paired with onsetQ
	sc.Onset.MedianS, sc.Onset.P10S, sc.Onset.P90S = quantile(on, 0.5), quantile(on, 0.1), quantile(on, 0.9)
	sc.Onset.MedianBreaths = quantile(sc.onsetBreaths, 0.5)
	sc.Clearing.N = len(sc.clearS)
	sc.Clearing.MedianS, sc.Clearing.P10S, sc.Clearing.P90S = quantile(sc.clearS, 0.5), quantile(sc.clearS, 0.1), quantile(sc.clearS, 0.9)
	sc.Clearing.MedianBreaths = Num(math.NaN())
	for i := range sc.Curve {
		c := &sc.Curve[i]
		c.Fraction = ratio(c.Alarmed, c.Breaths)
	}
}

// quantile returns the q-quantile of xs by linear interpolation between
// order statistics (type 7 of Hyndman and Fan, 1996); NaN for no data. It
// sorts xs in place.
func quantile(xs []float64, q float64) Num {
	if len(xs) == 0 {
		return Num(math.NaN())
	}
	sort.Float64s(xs)
	h := q * float64(len(xs)-1)
	lo := int(math.Floor(h))
	hi := min(lo+1, len(xs)-1)
	return Num(xs[lo] + (h-float64(lo))*(xs[hi]-xs[lo]))
}
