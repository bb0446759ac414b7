package simulator

import "math"

// Label names of the ground truth: the conditions truly present in a
// breath, named like the alert conditions.
const (
	// LabelAirTrapping: true intrinsic PEEP ≥ AirTrappingCmH2O.
	LabelAirTrapping = "air-trapping"
	// LabelHighPlateau: true plateau pressure > HighPlateauCmH2O.
	LabelHighPlateau = "high-plateau-pressure"
	// LabelHighDriving: true driving pressure (plateau − total PEEP) >
	// HighDrivingCmH2O.
	LabelHighDriving = "high-driving-pressure"
	// LabelSignalLost: the breath overlaps a disconnection of the signal.
	LabelSignalLost = "signal-lost"
	// LabelRisingPeak: the breath starts during a timeline ramp that
	// raises the peak pressure.
	LabelRisingPeak = "rising-peak-pressure"
	// LabelArtifact: the breath overlaps an artifact burst. It is not an
	// alert condition; it marks breaths whose samples are corrupted.
	LabelArtifact = "artifact"
)

// Thresholds of the labels.
const (
	// AirTrappingCmH2O is the intrinsic PEEP from which a breath is labelled
	// air-trapping.
	AirTrappingCmH2O = 2.0
	// HighPlateauCmH2O is the plateau limit (ARDS Network, NEJM 2000).
	HighPlateauCmH2O = 30.0
	// HighDrivingCmH2O is the driving-pressure limit (common practice,
	// after Amato et al., NEJM 2015).
	HighDrivingCmH2O = 15.0
)

// Truth is the ground truth of one completed breath: what the simulated
// patient really had, computed from the model state, not from the samples.
type Truth struct {
	Type   string `json:"type"` // always "truth"
	Stream string `json:"stream"`
	// Seq counts the breaths of the run from 1.
	Seq    int     `json:"seq"`
	StartS float64 `json:"t_start_s"` // start of inspiration
	EndS   float64 `json:"t_end_s"`   // start of the next inspiration
	TiS    float64 `json:"ti_s"`      // inspiration including any pause
	TeS    float64 `json:"te_s"`
	// RateBPM is 60 / (EndS − StartS).
	RateBPM float64 `json:"rr_bpm"`

	// RCmH2OSPerL, CMLPerCmH2O and TauS are the patient's mechanics; for
	// the non-linear models they are equivalent values (see doc.go).
	RCmH2OSPerL float64 `json:"r_cmh2o_s_per_l"`
	CMLPerCmH2O float64 `json:"c_ml_per_cmh2o"`
	TauS        float64 `json:"tau_s"`
	// TauFastS and TauSlowS are the two time constants of passive
	// exhalation of the two-compartment model; zero otherwise.
	TauFastS float64 `json:"tau_fast_s,omitempty"`
	TauSlowS float64 `json:"tau_slow_s,omitempty"`

	// VtML is the volume inspired during the inspiration.
	VtML float64 `json:"vt_ml"`
	// VteML is the volume expired during the expiration.
	VteML float64 `json:"vte_ml"`
	// TrappedML is the volume above the relaxation volume at the set PEEP at
	// the end of this breath's expiration.
	TrappedML float64 `json:"trapped_ml"`
	// PEEPiCmH2O is the intrinsic PEEP: the static recoil above the set PEEP
	// at the end of expiration (what an end-expiratory occlusion reads).
	PEEPiCmH2O float64 `json:"peepi_cmh2o"`
	// PlateauCmH2O is the static recoil pressure at the end of inspiration
	// (what an end-inspiratory occlusion reads), set PEEP included.
	PlateauCmH2O float64 `json:"pplat_cmh2o"`
	// PeakCmH2O is the highest airway pressure of the inspiration.
	PeakCmH2O float64 `json:"pip_cmh2o"`
	// DrivingCmH2O is plateau minus total PEEP.
	DrivingCmH2O float64 `json:"dp_cmh2o"`
	// EndExpFlowLPM is the expiratory flow (magnitude) just before the next
	// breath.
	EndExpFlowLPM float64 `json:"eef_lpm"`
	// PEEPCmH2O is the set PEEP.
	PEEPCmH2O float64 `json:"peep_cmh2o"`

	// ExpHoldS is the length of the expiratory hold that ended the
	// breath (both valves shut, no flow; included in TeS), or zero.
	ExpHoldS float64 `json:"exp_hold_s,omitempty"`

	// Passive is false when a muscle effort overlapped the breath.
	Passive bool `json:"passive"`
	// Triggered is true when the patient triggered the breath.
	Triggered bool `json:"triggered"`
	// Model is the patient model.
	Model string `json:"model"`
	// Labels are the conditions truly present (see the Label constants).
	Labels []string `json:"labels"`
}

// accum collects the ground truth of the breath in progress.
type accum struct {
	seq       int
	startS    float64
	endInspS  float64
	set       params
	vStart    float64
	vEndInsp  float64
	pip       float64
	effort    bool
	triggered bool
	// holdS is the length of an expiratory hold that ended the breath,
	// and eefLPS the flow as the valves shut for it.
	holdS, eefLPS float64
}

// finish turns the accumulated breath into its ground truth. vEnd is the
// total volume and eefLPS the flow at the end of the expiration.
func (a *accum) finish(tl *timeline, l *lung, stream string, endS, vEnd, eefLPS float64) Truth {
	c := l.compliance()
	peep := a.set.Ventilator.PEEPCmH2O
	tr := Truth{
		Type:          "truth",
		Stream:        stream,
		Seq:           a.seq,
		StartS:        a.startS,
		EndS:          endS,
		TiS:           a.endInspS - a.startS,
		TeS:           endS - a.endInspS,
		RateBPM:       60 / (endS - a.startS),
		CMLPerCmH2O:   c * 1000,
		VtML:          (a.vEndInsp - a.vStart) * 1000,
		VteML:         (a.vEndInsp - vEnd) * 1000,
		TrappedML:     (vEnd - c*peep) * 1000,
		PEEPiCmH2O:    vEnd/c - peep,
		PlateauCmH2O:  a.vEndInsp / c,
		PeakCmH2O:     a.pip,
		PEEPCmH2O:     peep,
		EndExpFlowLPM: math.Max(0, -eefLPS) * 60,
		ExpHoldS:      math.Round(a.holdS*1e9) / 1e9,
		Passive:       !a.effort,
		Triggered:     a.triggered,
		Model:         a.set.Patient.Model,
		Labels:        []string{},
	}
	tr.DrivingCmH2O = tr.PlateauCmH2O - peep - tr.PEEPiCmH2O
	// Times are sums of phase lengths: drop the last bits of rounding so
	// that 0.8 s reads 0.8, not 0.7999999999999999.
	for _, p := range []*float64{&tr.StartS, &tr.EndS, &tr.TiS, &tr.TeS, &tr.RateBPM} {
		*p = math.Round(*p*1e9) / 1e9
	}
	if l.two {
		g := 1/l.r[0] + 1/l.r[1]
		tr.RCmH2OSPerL = l.r0 + 1/g
		tr.TauFastS, tr.TauSlowS = l.expTimeConstants()
		tr.TauS = tr.RCmH2OSPerL * c
	} else {
		// Rohrer: inspiratory resistance at the mean inspiratory flow, and
		// the expiratory time constant at the end-expiratory flow.
		meanFlow := 0.0
		if flowTime := tr.TiS - a.set.Ventilator.PauseS; a.set.Ventilator.Mode == ModeVC && flowTime > 0 {
			meanFlow = tr.VtML / 1000 / flowTime
		} else if tr.TiS > 0 {
			meanFlow = tr.VtML / 1000 / tr.TiS
		}
		tr.RCmH2OSPerL = l.k1 + l.k2*meanFlow
		tr.TauS = (l.k1e + l.k2e*math.Abs(eefLPS)) * c
	}
	if tr.PEEPiCmH2O >= AirTrappingCmH2O {
		tr.Labels = append(tr.Labels, LabelAirTrapping)
	}
	if tr.PlateauCmH2O > HighPlateauCmH2O {
		tr.Labels = append(tr.Labels, LabelHighPlateau)
	}
	if tr.DrivingCmH2O > HighDrivingCmH2O {
		tr.Labels = append(tr.Labels, LabelHighDriving)
	}
	tr.Labels = a.timelineLabels(tr.Labels, tl, endS)
	return tr
}

// timelineLabels appends to labels the labels of the timeline windows
// that touch the breath ending at endS: a rising-peak window holding the
// breath's start, and disconnect, artifact and labelled windows that
// overlap the breath at all.
func (a *accum) timelineLabels(labels []string, tl *timeline, endS float64) []string {
	overlaps := func(w window) bool { return w.startS < endS && w.endS > a.startS }
	for _, w := range tl.risingPeak {
		if a.startS >= w.startS && a.startS <= w.endS {
			labels = addLabel(labels, LabelRisingPeak)
		}
	}
	for _, w := range tl.disconnect {
		if overlaps(w) {
			labels = addLabel(labels, LabelSignalLost)
		}
	}
	for _, w := range tl.artifacts {
		if overlaps(w) {
			labels = addLabel(labels, LabelArtifact)
		}
	}
	for _, w := range tl.labeled {
		if overlaps(w) {
			for _, lb := range w.labels {
				labels = addLabel(labels, lb)
			}
		}
	}
	return labels
}

// HasLabel reports whether the breath carries label lb.
func (t *Truth) HasLabel(lb string) bool {
	for _, x := range t.Labels {
		if x == lb {
			return true
		}
	}
	return false
}

func addLabel(ls []string, lb string) []string {
	for _, x := range ls {
		if x == lb {
			return ls
		}
	}
	return append(ls, lb)
}

// expTimeConstants returns the two time constants of passive exhalation of
// the two-compartment model: −1/λ for the eigenvalues λ of the linear
// system V' = A·V that holds with the airway at a constant pressure.
func (l *lung) expTimeConstants() (fast, slow float64) {
	g := [2]float64{1 / l.r[0], 1 / l.r[1]}
	den := 1 + l.r0*(g[0]+g[1])
	var a [2][2]float64
	for i := range 2 {
		for j := range 2 {
			d := l.r0 * g[j] / l.c[j] / den
			if i == j {
				d -= 1 / l.c[i]
			}
			a[i][j] = g[i] * d
		}
	}
	tr := a[0][0] + a[1][1]
	det := a[0][0]*a[1][1] - a[0][1]*a[1][0]
	disc := math.Sqrt(math.Max(0, tr*tr/4-det))
	l1, l2 := tr/2-disc, tr/2+disc // l1 more negative: the fast one
	return -1 / l1, -1 / l2
}
