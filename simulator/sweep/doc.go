// Package sweep runs every detector and estimator of trapline against
// families of simulated patients with known ground truth and measures how
// well they do: sensitivity and specificity per breath and per episode,
// false alerts per simulated hour, onset and clearing latency, and the
// error of the mechanics and air-trapping estimates. It writes a JSON
// summary and a self-contained HTML report with SVG plots.
//
// A Grid (Go value or YAML file) expands into a Plan of patients: patient
// models × resistance × compliance × ventilator settings × sensor noise ×
// seeds, plus the shipped scenarios. Run simulates every patient in-process
// on a bounded pool of one worker per core; each patient goes through the
// same pieces the daemon uses for one stream (simulator.Sim for the
// samples, analyze.Analyzer and analyze.Detectors for breaths and findings,
// alerts.Lifecycle for alert events), combined by the few lines in
// pipeline.go. Several detector configurations can ride on one simulation
// of a patient, so a comparison sees exactly the same samples.
//
// Scoring (metrics.go) works only from the ground truth of each breath and
// the alert events, so that it can be checked by an independent count.
// The definitions are in docs/sweep.md.
//
// The package may import simulator, ingest, analyze and alerts; nothing in
// the daemon is imported, and nothing outside the sweep verb imports it.
package sweep
