package sweep

import (
	"context"
	"fmt"
	"html/template"
	"io"
	"math"
	"slices"
	"strings"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/vg"

	"trapline/analyze"
)

// Example is one patient re-run with its samples recorded, for the example
// waveform of the report.
type Example struct {
	// Case names the patient.
	Case       string
	FromS, ToS float64
	Truth      []TruthBreath
	// Alerts are the alert events of the first detector set.
	Alerts []AlertEvent
	rec    recording
}

// PickExample chooses a patient whose air-trapping alarm was truly raised
// (a linear, clean one if there is such; else the first patient with any
// alert, else the first patient) and runs it again, recording the minute
// around the first raise. It returns nil only for an empty result.
func PickExample(ctx context.Context, r *Result, acfg *analyze.Config) (*Example, error) {
	best, bestScore, raiseS := -1, -1, 0.0
	ai := indexOf(Scored(), analyze.CondAirTrapping)
	for i := range r.Cases {
		c := &r.Cases[i]
		for _, e := range c.Alerts[0] {
			if e.Condition != analyze.CondAirTrapping || !e.Fresh || !labelledAt(c.Truth, ai, e.TS) {
				continue
			}
			score := 0
			if c.Case.Model == ModelLinear {
				score += 2
			}
			if c.Case.Noise == "clean" {
				score++
			}
			if score > bestScore {
				best, bestScore, raiseS = i, score, e.TS
			}
			break
		}
	}
	if best < 0 {
		// No true air-trapping alarm anywhere: show the first minute of
		// the first patient with any alert, or of the first patient.
		best, raiseS = 0, 35
		for i := range r.Cases {
			if k := slices.IndexFunc(r.Cases[i].Alerts[0], func(e AlertEvent) bool { return e.Fresh }); k >= 0 {
				best, raiseS = i, r.Cases[i].Alerts[0][k].TS
				break
			}
		}
	}
	if len(r.Cases) == 0 {
		return nil, nil
	}
	c := r.Cases[best].Case
	from := math.Max(0, raiseS-35)
	to := math.Min(c.DurationS, from+60)
	ex := &Example{Case: c.Name, FromS: from, ToS: to, rec: recording{fromS: from, toS: to}}
	cfg := analyze.DefaultConfig()
	if acfg != nil {
		cfg = *acfg
	}
	res, err := runCase(ctx, c, r.Sets[:1], cfg, &ex.rec, nil)
	if err != nil {
		return nil, fmt.Errorf("example %s: %w", c.Name, err)
	}
	ex.Truth, ex.Alerts = res.Truth, res.Alerts[0]
	return ex, nil
}

// labelledAt reports whether the breath that ends nearest to tS truly has
// the condition with index ci, so that the example shows a true alarm.
func labelledAt(truth []TruthBreath, ci int, tS float64) bool {
	best, bestD := -1, math.Inf(1)
	for i := range truth {
		if d := math.Abs(truth[i].EndS - tS); d < bestD {
			best, bestD = i, d
		}
	}
	return best >= 0 && truth[best].Has(ci)
}

// reportData is what the HTML template shows.
type reportData struct {
	S        *Summary
	Sets     []string
	Compare  bool
	Headline []headRow
	ByModel  []modelRow
	Curve    template.HTML
	Limits   template.HTML
	Latency  []template.HTML
	Scatter  template.HTML
	Errors   template.HTML
	Dist     template.HTML
	Wave     template.HTML
	Example  string
	Est      []EstimatorError
	Other    []string
	Classes  []ClassScore
	// Holds is true when the grid scheduled end-expiratory holds.
	Holds bool
}

type headRow struct {
	Condition string
	Cells     [][]string // per set (and the difference), the figures
}

type modelRow struct {
	Model string
	Hours string
	Cells []string // per condition: breath sensitivity / specificity
}

func pct(n Num) string {
	if math.IsNaN(float64(n)) {
		return "–"
	}
	return fmt.Sprintf("%.1f %%", 100*float64(n))
}

func num(n Num, prec int) string {
	if math.IsNaN(float64(n)) || math.IsInf(float64(n), 0) {
		return "–"
	}
	return fmt.Sprintf("%.*f", prec, float64(n))
}

func diff(a, b Num, scale float64, prec int, unit string) string {
	d := float64(b-a) * scale
	if math.IsNaN(d) {
		return "–"
	}
	return fmt.Sprintf("%+.*f%s", prec, d, unit)
}

// headline formats the figures of one condition score.
func headline(c *ConditionScore) []string {
	return []string{
		pct(c.Breath.Sensitivity), pct(c.Breath.Specificity),
		fmt.Sprintf("%s (%d/%d)", pct(c.Episode.Sensitivity), c.Episode.Detected, c.Episode.Positive),
		fmt.Sprintf("%s (%d/%d)", pct(c.Episode.Specificity), c.Episode.Clean, c.Episode.Negative),
		num(c.FalseAlertsPerHour, 3),
		fmt.Sprintf("%s (%s)", num(c.Onset.MedianS, 1), num(c.Onset.P90S, 1)),
		fmt.Sprintf("%s (%s)", num(c.Clearing.MedianS, 1), num(c.Clearing.P90S, 1)),
	}
}

func headlineDiff(a, b *ConditionScore) []string {
	return []string{
		diff(a.Breath.Sensitivity, b.Breath.Sensitivity, 100, 1, " pt"),
		diff(a.Breath.Specificity, b.Breath.Specificity, 100, 1, " pt"),
		diff(a.Episode.Sensitivity, b.Episode.Sensitivity, 100, 1, " pt"),
		diff(a.Episode.Specificity, b.Episode.Specificity, 100, 1, " pt"),
		diff(a.FalseAlertsPerHour, b.FalseAlertsPerHour, 1, 3, ""),
		diff(a.Onset.MedianS, b.Onset.MedianS, 1, 1, " s"),
		diff(a.Clearing.MedianS, b.Clearing.MedianS, 1, 1, " s"),
	}
}

// WriteReport writes the self-contained HTML report: tables and inline SVG
// plots, no external resources. ex may be nil.
func WriteReport(w io.Writer, r *Result, s *Summary, ex *Example) error {
	d := reportTables(s)
	if err := d.addCurvePlots(s); err != nil {
		return err
	}
	if err := d.addLatencyPlots(s); err != nil {
		return err
	}
	ls, err := latencyScatter(s, analyze.CondAirTrapping, "air-trapping: onset latency vs true intrinsic PEEP", "median true intrinsic PEEP of the episode (cmH2O)")
	if err != nil {
		return err
	}
	if d.Scatter, err = svgHTML(vg.Points(760), vg.Points(300), 1, ls); err != nil {
		return err
	}
	er, err := errorCurvePlot(s.ErrorVsR, "R estimate vs true R", "true R (cmH2O·s/L)")
	if err != nil {
		return err
	}
	ec, err := errorCurvePlot(s.ErrorVsC, "C estimate vs true C", "true C (mL/cmH2O)")
	if err != nil {
		return err
	}
	if d.Errors, err = svgHTML(vg.Points(900), vg.Points(320), 1, er, ec); err != nil {
		return err
	}
	var dist []*plot.Plot
	for _, x := range []struct {
		q, title, label string
		rel             bool
	}{
		{"tau_s", "time constant", "τ error (%): median, 5–95 %", true},
		{"trapped_ml", "trapped volume", "error (mL): median, 5–95 %", false},
		{"peepi_cmh2o", "intrinsic PEEP", "error (cmH2O): median, 5–95 %", false},
	} {
		p, err := distributionPlot(s.Estimators, x.q, x.title, x.label, x.rel)
		if err != nil {
			return err
		}
		dist = append(dist, p)
	}
	if d.Dist, err = svgHTML(vg.Points(900), vg.Points(300), 1, dist...); err != nil {
		return err
	}
	if ex != nil {
		pp, fp, err := waveformPlots(ex)
		if err != nil {
			return err
		}
		if d.Wave, err = svgHTML(vg.Points(900), vg.Points(420), 2, pp, fp); err != nil {
			return err
		}
		d.Example = ex.Case
	}
	if err := reportTmpl.Execute(w, d); err != nil {
		return fmt.Errorf("write report: %w", err)
	}
	return nil
}

// reportTables fills the tables of the report: the headline per
// condition and detector set, the rows per model and per sample rate,
// and the alerts of conditions that are not scored.
func reportTables(s *Summary) reportData {
	d := reportData{S: s, Compare: len(s.Sets) > 1, Est: s.Estimators, Classes: s.Sets[0].Classes}
	for _, c := range d.Classes {
		d.Holds = d.Holds || c.Holds != nil
	}
	for _, set := range s.Sets {
		d.Sets = append(d.Sets, set.Name)
	}
	for ci, cond := range Scored() {
		row := headRow{Condition: cond}
		for si := range s.Sets {
			row.Cells = append(row.Cells, headline(&s.Sets[si].Conditions[ci]))
		}
		if d.Compare {
			row.Cells = append(row.Cells, headlineDiff(&s.Sets[0].Conditions[ci], &s.Sets[1].Conditions[ci]))
		}
		d.Headline = append(d.Headline, row)
	}
	group := func(name string, hours Num, cs []ConditionScore) modelRow {
		row := modelRow{Model: name, Hours: num(hours, 1)}
		for ci := range cs {
			row.Cells = append(row.Cells, pct(cs[ci].Breath.Sensitivity)+" / "+pct(cs[ci].Breath.Specificity))
		}
		return row
	}
	for _, m := range s.Sets[0].ByModel {
		d.ByModel = append(d.ByModel, group(m.Model, m.PatientHours, m.Conditions))
	}
	for _, r := range s.Sets[0].BySampleRate {
		d.ByModel = append(d.ByModel, group(fmt.Sprintf("all models at %g Hz", r.SampleRateHz), r.PatientHours, r.Conditions))
	}
	for _, set := range s.Sets {
		for cond, n := range set.OtherAlerts {
			times := fmt.Sprintf("%d times", n)
			if n == 1 {
				times = "once"
			}
			d.Other = append(d.Other, fmt.Sprintf("%s: %s raised %s (%.3f per hour)", set.Name, cond, times, float64(n)/float64(s.PatientHours)))
		}
	}
	return d
}

// addCurvePlots draws the detection curves: air trapping against the true
// intrinsic PEEP, and the pressure limits against their true pressures.
func (d *reportData) addCurvePlots(s *Summary) error {
	var err error
	cp, err := curvePlot(s, analyze.CondAirTrapping, "air-trapping: alarm vs true intrinsic PEEP", "true intrinsic PEEP (cmH2O)")
	if err != nil {
		return err
	}
	if d.Curve, err = svgHTML(vg.Points(760), vg.Points(380), 1, cp); err != nil {
		return err
	}
	var lim []*plot.Plot
	for _, x := range []struct{ cond, title, label string }{
		{analyze.CondHighPlateauPressure, "high plateau", "true plateau (cmH2O)"},
		{analyze.CondHighDrivingPressure, "high driving pressure", "true driving pressure (cmH2O)"},
		{analyze.CondHighPeakPressure, "high peak pressure", "true peak pressure (cmH2O)"},
	} {
		p, err := curvePlot(s, x.cond, x.title, x.label)
		if err != nil {
			return err
		}
		lim = append(lim, p)
	}
	if d.Limits, err = svgHTML(vg.Points(900), vg.Points(300), 1, lim...); err != nil {
		return err
	}
	return nil
}

// addLatencyPlots draws the onset and clearing latency histograms of each
// condition that has any, all detector sets on the same axes.
func (d *reportData) addLatencyPlots(s *Summary) error {
	for ci, cond := range Scored() {
		var on, cl [][]float64
		total := 0
		for si := range s.Sets {
			c := &s.Sets[si].Conditions[ci]
			on, cl = append(on, c.onsetS), append(cl, c.clearS)
			total += len(c.onsetS) + len(c.clearS)
		}
		if total == 0 {
			continue
		}
		po, err := histPlot(cond+": onset latency", on, d.Sets)
		if err != nil {
			return err
		}
		pc, err := histPlot(cond+": clearing latency", cl, d.Sets)
		if err != nil {
			return err
		}
		h, err := svgHTML(vg.Points(760), vg.Points(230), 1, po, pc)
		if err != nil {
			return err
		}
		d.Latency = append(d.Latency, h)
	}
	return nil
}

func svgHTML(w, h vg.Length, rows int, plots ...*plot.Plot) (template.HTML, error) {
	s, err := svgOf(w, h, rows, plots...)
	// The SVG is generated here from numbers, never from input text other
	// than condition, model and set names, which the plot library escapes.
	return template.HTML(s), err //nolint:gosec
}

var reportTmpl = template.Must(template.New("report").Funcs(template.FuncMap{
	"num": num, "pct": pct, "join": strings.Join,
}).Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>trapline detector sweep</title>
<style>
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:24px auto;max-width:1180px;color:#222;line-height:1.4}
h1{font-size:1.6em;margin-bottom:0}h2{margin-top:1.8em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:0.6em 0;font-size:0.9em}
th,td{border:1px solid #ccc;padding:3px 7px;text-align:right}th{background:#f2f2f2}
td:first-child,th:first-child{text-align:left}
.caution{background:#fff4e0;border:1px solid #e6b35c;padding:6px 10px;font-size:0.9em}
.facts span{display:inline-block;margin-right:1.6em}
svg{max-width:100%;height:auto;display:block;margin:0.5em 0}
.note{color:#555;font-size:0.9em}
</style></head><body>
<h1>trapline detector sweep</h1>
<p class="caution">Research use only. trapline is not a medical device and does not replace the ventilator's own alarms. These figures describe detectors on simulated patients, not clinical performance.</p>
<p class="facts"><span><b>{{.S.Patients}}</b> simulated patients</span><span><b>{{num .S.PatientHours 1}}</b> patient-hours</span><span>{{range $i, $r := .S.SampleRatesHz}}{{if $i}}, {{end}}{{$r}}{{end}} Hz</span><span>{{.S.BreathsSimulated}} breaths simulated, {{.S.BreathsAnalysed}} analysed</span><span>{{num .S.ElapsedS 1}} s on {{.S.Workers}} workers ({{num .S.RealtimeFactor 0}}× real time)</span><span>detector sets: {{join .Sets ", "}}</span></p>

<h2>Headline</h2>
<p class="note">Per breath: the alarm is active at the end of a breath that truly has the condition (sensitivity) or truly has not (specificity). Per episode: runs of at least {{.S.Episodes.MinBreaths}} breaths. Latency: median (90th percentile) in seconds. Definitions in docs/sweep.md.</p>
<table><tr><th>condition</th>{{if .Compare}}<th>set</th>{{end}}<th>sensitivity (breath)</th><th>specificity (breath)</th><th>sensitivity (episode)</th><th>specificity (episode)</th><th>false alerts / h</th><th>onset latency s</th><th>clearing latency s</th></tr>
{{range .Headline}}{{$c := .Condition}}{{range $i, $cells := .Cells}}<tr><td>{{if eq $i 0}}{{$c}}{{end}}</td>{{if $.Compare}}<td>{{if lt $i (len $.Sets)}}{{index $.Sets $i}}{{else}}difference{{end}}</td>{{end}}{{range $cells}}<td>{{.}}</td>{{end}}</tr>
{{end}}{{end}}</table>
{{range .Other}}<p class="note">Alerts without ground truth: {{.}}</p>{{end}}

<h2>Sensitivity against the true quantity</h2>
<p class="note">Fraction of breaths with the alarm active, by bin of the true value; the dashed line is the threshold of the ground-truth label. Left of it the curve is 1 − specificity, right of it the sensitivity.</p>
{{.Curve}}
{{.Limits}}

<h2>Latency</h2>
<p class="note">Onset: from the end of the first breath of an episode to the raise. Clearing: from the end of the last breath with the condition to the clearing.</p>
{{.Scatter}}
{{range .Latency}}{{.}}{{end}}

<h2>By patient model and sample rate ({{index .Sets 0}})</h2>
<p class="note">Breath sensitivity / specificity.</p>
<table><tr><th>model</th><th>hours</th>{{range .Headline}}<th>{{.Condition}}</th>{{end}}</tr>
{{range .ByModel}}<tr><td>{{.Model}}</td><td>{{.Hours}}</td>{{range .Cells}}<td>{{.}}</td>{{end}}</tr>
{{end}}</table>

<h2>Air trapping by class ({{index .Sets 0}})</h2>
<p class="note">A class is every patient that shares one value of one grid dimension. Settled sensitivity: breaths with a true intrinsic PEEP ≥ 2 cmH2O from the 7th breath of their episode on. Onset in breaths from the first such breath. False raises: alarms that never overlapped a trapping breath nor a grey-zone breath (true intrinsic PEEP 1–2 cmH2O); grey raises: alarms that overlapped only grey-zone breaths; non-trapping hours: patients whose true intrinsic PEEP stayed below 1 cmH2O. PEEPi ±1: estimates within 1 cmH2O of the truth, or flagged lower bounds that are honest (docs/sweep.md). R and C: median absolute relative error.</p>
<table><tr><th>class</th><th>patients</th><th>hours</th><th>settled sens.</th><th>settled breaths</th><th>episodes</th><th>unalarmed</th><th>max onset (breaths)</th><th>onsets &gt; 6</th><th>false raises</th><th>grey raises</th><th>non-trapping h</th><th>PEEPi ±1</th><th>bound</th><th>R err %</th><th>C err %</th></tr>
{{range .Classes}}<tr><td>{{.Class}}</td><td>{{.Patients}}</td><td>{{num .PatientHours 1}}</td><td>{{num .SensitivitySettled 3}}</td><td>{{.SettledBreaths}}</td><td>{{.Episodes}}</td><td>{{.Unalarmed}}</td><td>{{num .OnsetMaxBreaths 0}}</td><td>{{.OnsetOver6}}</td><td>{{.FalseRaises}}</td><td>{{.GreyRaises}}</td><td>{{num .NonTrappingHours 1}}</td><td>{{num .PEEPiWithin 3}}</td><td>{{.PEEPiBound}}</td><td>{{num .RMedianRelPct 1}}</td><td>{{num .CMedianRelPct 1}}</td></tr>
{{end}}</table>
{{if .Holds}}
<h2>End-expiratory holds by class ({{index .Sets 0}})</h2>
<p class="note">Passive breaths that truly ended in a hold. PEEPi ±1 as above, over them. Missed: true intrinsic PEEP ≥ 0.5 cmH2O and not flagged exp-hold. False: flagged exp-hold without a hold. Still rising: flagged hold-unsettled (a lower bound).</p>
<table><tr><th>class</th><th>holds</th><th>PEEPi ±1</th><th>missed</th><th>false</th><th>still rising</th></tr>
{{range $c := .Classes}}{{with $c.Holds}}<tr><td>{{$c.Class}}</td><td>{{.N}}</td><td>{{num .Within 3}}</td><td>{{.Missed}}</td><td>{{.False}}</td><td>{{.Unsettled}}</td></tr>{{end}}
{{end}}</table>
{{end}}
<h2>Estimators</h2>
<p class="note">Error = estimate − truth per analysed breath. For the non-linear models the truth is the equivalent R, C and τ of the simulator (see docs/sweep.md).</p>
{{.Errors}}
{{.Dist}}
<table><tr><th>model</th><th>quantity</th><th>n</th><th>missing</th><th>bias</th><th>median</th><th>p05</th><th>p95</th><th>RMSE</th><th>median rel. %</th><th>p05 rel. %</th><th>p95 rel. %</th></tr>
{{range .Est}}<tr><td>{{.Model}}</td><td>{{.Quantity}}</td><td>{{.N}}</td><td>{{.Missing}}</td><td>{{num .Bias 3}}</td><td>{{num .Median 3}}</td><td>{{num .P05 3}}</td><td>{{num .P95 3}}</td><td>{{num .RMSE 3}}</td><td>{{num .MedianRelPct 1}}</td><td>{{num .P05RelPct 1}}</td><td>{{num .P95RelPct 1}}</td></tr>
{{end}}</table>

{{if .Wave}}<h2>Example waveform</h2>
<p class="note">{{.Example}}: grey lines are the starts of the analysed breaths, the purple band marks breaths that truly trap air (intrinsic PEEP ≥ 2 cmH2O), dashed vermilion lines are raised alerts and green ones cleared alerts.</p>
{{.Wave}}{{end}}
</body></html>
`))
