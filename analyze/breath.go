package analyze

import (
	"encoding/json"
	"fmt"
	"math"
	"strconv"
)

// BreathSchema is the version of the breath record contract. Version 2
// added the air-trapping fields below and the provenance fields
// trapline_version and config_digest.
const BreathSchema = 2

// Breath is the per-breath record (the breath record contract). A value that
// is unknown or unreliable is NaN in Go and null in JSON, never 0.
type Breath struct {
	Stream string
	Seq    int

	StartS  float64 // time of the start of inspiration
	EndS    float64 // time of the start of the next inspiration
	TiS     float64 // inspiratory time (flow in plus any end-inspiratory pause)
	TeS     float64 // expiratory time
	RateBPM float64

	VtiML float64 // inspired volume
	VteML float64 // expired volume (magnitude)

	PeakCmH2O    float64 // peak inspiratory pressure
	PlateauCmH2O float64 // end-inspiratory pause pressure; NaN when there is no pause
	PEEPCmH2O    float64 // airway pressure at end-expiration
	MeanCmH2O    float64 // mean airway pressure over the breath

	PeakInspFlowLPM float64 // peak inspiratory flow
	PeakExpFlowLPM  float64 // peak expiratory flow (magnitude)
	EndExpFlowLPM   float64 // expiratory flow just before the next breath (magnitude)

	TauS      float64 // expiratory time constant
	TeOverTau float64

	// Least-squares fit of the equation of motion over the breath.
	RCmH2OSPerL float64
	CMLPerCmH2O float64
	PTot0CmH2O  float64 // fitted total PEEP (P0)
	FitR2       float64

	// Occlusion (end-inspiratory pause) method, when a pause exists.
	ROccCmH2OSPerL  float64
	CStatMLPerCmH2O float64

	// Air trapping: the reported estimate and the two independent ones.
	TrappedML     float64
	PEEPiCmH2O    float64
	TrappedEEFML  float64 // end-expiratory flow × τ
	PEEPiEEFCmH2O float64 // end-expiratory flow × R
	PEEPiFitCmH2O float64 // P0 − end-expiratory pressure

	// Schema 2.
	TauEndS         float64 // end-expiratory time constant (last third of the expiration)
	TrappedExpFitML float64 // volume still to exhale from a two-exponential fit of expiration
	RK1CmH2OSPerL   float64 // Rohrer K1, when the breath is flagged rohrer
	RK2CmH2OS2PerL2 float64 // Rohrer K2, when the breath is flagged rohrer
	FlowOffsetLPM   float64 // flow offset removed from the samples of this breath
	LeakLPMPerCmH2O float64 // leak conductance removed from the samples of this breath
	// Settings inferred from the waveform: the set inspiratory flow
	// (volume control) or pressure above PEEP (pressure control).
	SetFlowLPM           float64
	SetInspPressureCmH2O float64
	// End-expiratory hold (flag exp-hold): its length and the static
	// intrinsic PEEP read from it; NaN when the breath had none.
	ExpHoldS       float64
	PEEPiHoldCmH2O float64
	// Mode is the inferred mode, ModeVolume or ModePressure; "" when it
	// could not be told.
	Mode string
	// SettingsChanged lists the settings that changed with this breath,
	// e.g. "rate-up", "peep-down", "mode-pc"; nil when none did.
	SettingsChanged []string

	Flags []string

	// Provenance: the program version and the digest of the analysis,
	// detector and alarm configuration that produced the record. The
	// pipeline fills them in; they are empty in records made by the
	// analyzer alone.
	TraplineVersion string
	ConfigDigest    string
}

// NewBreath returns a breath record with every measured value unknown (NaN).
func NewBreath() Breath {
	n := math.NaN()
	return Breath{
		StartS: n, EndS: n, TiS: n, TeS: n, RateBPM: n, VtiML: n, VteML: n,
		PeakCmH2O: n, PlateauCmH2O: n, PEEPCmH2O: n, MeanCmH2O: n,
		PeakInspFlowLPM: n, PeakExpFlowLPM: n, EndExpFlowLPM: n,
		TauS: n, TeOverTau: n, RCmH2OSPerL: n, CMLPerCmH2O: n, PTot0CmH2O: n, FitR2: n,
		ROccCmH2OSPerL: n, CStatMLPerCmH2O: n,
		TrappedML: n, PEEPiCmH2O: n, TrappedEEFML: n, PEEPiEEFCmH2O: n, PEEPiFitCmH2O: n,
		TauEndS: n, TrappedExpFitML: n, RK1CmH2OSPerL: n, RK2CmH2OS2PerL2: n, FlowOffsetLPM: n, LeakLPMPerCmH2O: n,
		SetFlowLPM: n, SetInspPressureCmH2O: n, ExpHoldS: n, PEEPiHoldCmH2O: n,
	}
}

// HasFlag reports whether the breath carries flag f.
func (b *Breath) HasFlag(f string) bool {
	for _, g := range b.Flags {
		if g == f {
			return true
		}
	}
	return false
}

// breathField ties a JSON key to a numeric field; the order is the order of
// the keys in the record.
type breathField struct {
	key string
	get func(*Breath) *float64
	// digits after the decimal point; enough for the precision of the method.
	prec int
}

var breathFields = []breathField{
	{"t_start_s", func(b *Breath) *float64 { return &b.StartS }, 3},
	{"t_end_s", func(b *Breath) *float64 { return &b.EndS }, 3},
	{"ti_s", func(b *Breath) *float64 { return &b.TiS }, 3},
	{"te_s", func(b *Breath) *float64 { return &b.TeS }, 3},
	{"rr_bpm", func(b *Breath) *float64 { return &b.RateBPM }, 2},
	{"vti_ml", func(b *Breath) *float64 { return &b.VtiML }, 1},
	{"vte_ml", func(b *Breath) *float64 { return &b.VteML }, 1},
	{"pip_cmh2o", func(b *Breath) *float64 { return &b.PeakCmH2O }, 2},
	{"pplat_cmh2o", func(b *Breath) *float64 { return &b.PlateauCmH2O }, 2},
	{"peep_cmh2o", func(b *Breath) *float64 { return &b.PEEPCmH2O }, 2},
	{"pmean_cmh2o", func(b *Breath) *float64 { return &b.MeanCmH2O }, 2},
	{"pif_lpm", func(b *Breath) *float64 { return &b.PeakInspFlowLPM }, 2},
	{"pef_lpm", func(b *Breath) *float64 { return &b.PeakExpFlowLPM }, 2},
	{"eef_lpm", func(b *Breath) *float64 { return &b.EndExpFlowLPM }, 2},
	{"tau_s", func(b *Breath) *float64 { return &b.TauS }, 3},
	{"te_over_tau", func(b *Breath) *float64 { return &b.TeOverTau }, 3},
	{"r_cmh2o_s_per_l", func(b *Breath) *float64 { return &b.RCmH2OSPerL }, 2},
	{"c_ml_per_cmh2o", func(b *Breath) *float64 { return &b.CMLPerCmH2O }, 2},
	{"ptot0_cmh2o", func(b *Breath) *float64 { return &b.PTot0CmH2O }, 2},
	{"fit_r2", func(b *Breath) *float64 { return &b.FitR2 }, 4},
	{"r_occ_cmh2o_s_per_l", func(b *Breath) *float64 { return &b.ROccCmH2OSPerL }, 2},
	{"c_stat_ml_per_cmh2o", func(b *Breath) *float64 { return &b.CStatMLPerCmH2O }, 2},
	{"trapped_ml", func(b *Breath) *float64 { return &b.TrappedML }, 1},
	{"peepi_cmh2o", func(b *Breath) *float64 { return &b.PEEPiCmH2O }, 2},
	{"trapped_eef_ml", func(b *Breath) *float64 { return &b.TrappedEEFML }, 1},
	{"peepi_eef_cmh2o", func(b *Breath) *float64 { return &b.PEEPiEEFCmH2O }, 2},
	{"peepi_fit_cmh2o", func(b *Breath) *float64 { return &b.PEEPiFitCmH2O }, 2},
	{"tau_end_s", func(b *Breath) *float64 { return &b.TauEndS }, 3},
	{"trapped_expfit_ml", func(b *Breath) *float64 { return &b.TrappedExpFitML }, 1},
	{"r_k1_cmh2o_s_per_l", func(b *Breath) *float64 { return &b.RK1CmH2OSPerL }, 2},
	{"r_k2_cmh2o_s2_per_l2", func(b *Breath) *float64 { return &b.RK2CmH2OS2PerL2 }, 2},
	{"flow_offset_lpm", func(b *Breath) *float64 { return &b.FlowOffsetLPM }, 3},
	{"leak_lpm_per_cmh2o", func(b *Breath) *float64 { return &b.LeakLPMPerCmH2O }, 4},
	{"set_flow_lpm", func(b *Breath) *float64 { return &b.SetFlowLPM }, 1},
	{"set_pinsp_cmh2o", func(b *Breath) *float64 { return &b.SetInspPressureCmH2O }, 1},
	{"exp_hold_s", func(b *Breath) *float64 { return &b.ExpHoldS }, 2},
	{"peepi_hold_cmh2o", func(b *Breath) *float64 { return &b.PEEPiHoldCmH2O }, 2},
}

// AppendJSON appends the breath as one JSON object (no newline) to dst. It is
// the encoder behind MarshalJSON, written by hand so that unknown values come
// out as null and publishing a breath does not go through reflection.
func (b *Breath) AppendJSON(dst []byte) []byte {
	dst = append(dst, `{"type":"breath","schema":`...)
	dst = strconv.AppendInt(dst, BreathSchema, 10)
	dst = append(dst, `,"stream":`...)
	dst = strconv.AppendQuote(dst, b.Stream)
	dst = append(dst, `,"seq":`...)
	dst = strconv.AppendInt(dst, int64(b.Seq), 10)
	for _, f := range breathFields {
		dst = append(dst, ',', '"')
		dst = append(dst, f.key...)
		dst = append(dst, '"', ':')
		dst = appendNumber(dst, *f.get(b), f.prec)
	}
	dst = append(dst, `,"mode":`...)
	if b.Mode == "" {
		dst = append(dst, "null"...)
	} else {
		dst = strconv.AppendQuote(dst, b.Mode)
	}
	dst = append(dst, `,"settings_changed":[`...)
	for i, c := range b.SettingsChanged {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = strconv.AppendQuote(dst, c)
	}
	dst = append(dst, ']')
	dst = append(dst, `,"flags":[`...)
	for i, f := range b.Flags {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = strconv.AppendQuote(dst, f)
	}
	dst = append(dst, `],"trapline_version":`...)
	dst = strconv.AppendQuote(dst, b.TraplineVersion)
	dst = append(dst, `,"config_digest":`...)
	dst = strconv.AppendQuote(dst, b.ConfigDigest)
	return append(dst, '}')
}

// appendNumber writes v rounded to prec decimals, or null when v is not finite.
func appendNumber(dst []byte, v float64, prec int) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return append(dst, "null"...)
	}
	start := len(dst)
	dst = strconv.AppendFloat(dst, v, 'f', prec, 64)
	// Trim trailing zeros of the fraction so records stay short and read well.
	if prec > 0 {
		i := len(dst)
		for dst[i-1] == '0' {
			i--
		}
		if dst[i-1] == '.' {
			i--
		}
		dst = dst[:i]
	}
	// A small negative value rounds to "-0": write it as 0.
	if len(dst)-start == 2 && dst[start] == '-' && dst[start+1] == '0' {
		dst = append(dst[:start], '0')
	}
	return dst
}

// MarshalJSON encodes the breath record contract.
func (b Breath) MarshalJSON() ([]byte, error) {
	return b.AppendJSON(make([]byte, 0, 768)), nil
}

// UnmarshalJSON decodes a breath record; null becomes NaN.
func (b *Breath) UnmarshalJSON(data []byte) error {
	var raw map[string]json.RawMessage
	if err := json.Unmarshal(data, &raw); err != nil {
		return fmt.Errorf("decode breath: %w", err)
	}
	*b = NewBreath()
	if v, ok := raw["type"]; ok {
		var typ string
		if err := json.Unmarshal(v, &typ); err != nil || typ != "breath" {
			return fmt.Errorf("decode breath: type is %s, want \"breath\"", v)
		}
	}
	if v, ok := raw["stream"]; ok {
		if err := json.Unmarshal(v, &b.Stream); err != nil {
			return fmt.Errorf("decode breath: stream: %w", err)
		}
	}
	if v, ok := raw["seq"]; ok {
		if err := json.Unmarshal(v, &b.Seq); err != nil {
			return fmt.Errorf("decode breath: seq: %w", err)
		}
	}
	for _, f := range breathFields {
		v, ok := raw[f.key]
		if !ok {
			continue
		}
		var p *float64
		if err := json.Unmarshal(v, &p); err != nil {
			return fmt.Errorf("decode breath: %s: %w", f.key, err)
		}
		if p != nil {
			*f.get(b) = *p
		}
	}
	if v, ok := raw["mode"]; ok && string(v) != "null" {
		if err := json.Unmarshal(v, &b.Mode); err != nil {
			return fmt.Errorf("decode breath: mode: %w", err)
		}
	}
	if v, ok := raw["settings_changed"]; ok {
		if err := json.Unmarshal(v, &b.SettingsChanged); err != nil {
			return fmt.Errorf("decode breath: settings_changed: %w", err)
		}
		if len(b.SettingsChanged) == 0 {
			b.SettingsChanged = nil
		}
	}
	if v, ok := raw["flags"]; ok {
		if err := json.Unmarshal(v, &b.Flags); err != nil {
			return fmt.Errorf("decode breath: flags: %w", err)
		}
	}
	for key, dst := range map[string]*string{"trapline_version": &b.TraplineVersion, "config_digest": &b.ConfigDigest} {
		if v, ok := raw[key]; ok {
			if err := json.Unmarshal(v, dst); err != nil {
				return fmt.Errorf("decode breath: %s: %w", key, err)
			}
		}
	}
	return nil
}
