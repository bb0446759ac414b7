package config

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"reflect"
	"runtime/debug"
	"strings"

	"trapline/alerts"
	"trapline/analyze"
)

// BuildVersion is the release version, set at build time with
// -ldflags "-X trapline/config.BuildVersion=v1.2.3"; empty in a plain build.
var BuildVersion = ""

// ProgramVersion returns the version of this build: BuildVersion when set,
// else the module version recorded by the Go toolchain (a `go install` of a
// tagged release), else "dev"; followed by "+" and the first 12 hex digits
// of the source revision, and "-dirty" for uncommitted changes, when the
// build recorded them.
func ProgramVersion() string {
	v := BuildVersion
	info, ok := debug.ReadBuildInfo()
	if v == "" && ok && info.Main.Version != "" && info.Main.Version != "(devel)" {
		v = info.Main.Version
	}
	if v == "" {
		v = "dev"
	}
	if !ok {
		return v
	}
	var rev, dirty string
	for _, s := range info.Settings {
		switch {
		case s.Key == "vcs.revision":
			rev = s.Value[:min(12, len(s.Value))]
		case s.Key == "vcs.modified" && s.Value == "true":
			dirty = "-dirty"
		}
	}
	if rev != "" && !strings.Contains(v, rev) {
		v += "+" + rev + dirty
	}
	return v
}

// DigestSections are the configuration sections whose values decide what
// the analysis computes and when it alarms; the provenance digest covers
// them and nothing else (not where data comes from or goes to, not logging).
var DigestSections = []string{"analysis", "detectors", "alarms"}

// DigestLen is the number of hex digits of a short digest.
const DigestLen = 12

// Provenance says which program and which settings produced a result. The
// JSON names are those to add to breath records and alert events.
type Provenance struct {
	// Version is ProgramVersion().
	Version string `json:"trapline_version"`
	// ConfigDigest is the short digest of the analysis, detectors and
	// alarms settings (AnalysisDigest).
	ConfigDigest string `json:"config_digest"`
}

// Provenance returns the provenance of results computed with c.
func (c *Config) Provenance() Provenance {
	return Provenance{Version: ProgramVersion(), ConfigDigest: AnalysisDigest(c.Analysis, c.Detectors, c.Alarms)}
}

// Digest returns the short digest of c's analysis, detectors and alarms
// sections (see AnalysisDigest).
func (c *Config) Digest() string { return AnalysisDigest(c.Analysis, c.Detectors, c.Alarms) }

// AnalysisDigest returns the first DigestLen hex digits of the SHA-256 of
// the canonical encoding of the three sections (CanonicalAnalysis), so that
// `trapline analyze` with its sections alone and the daemon with a whole
// configuration agree.
func AnalysisDigest(a analyze.Config, d analyze.DetectorConfig, l alerts.LifecycleConfig) string {
	sum := sha256.Sum256(CanonicalAnalysis(a, d, l))
	return hex.EncodeToString(sum[:])[:DigestLen]
}

// CanonicalAnalysis encodes the effective values of the analysis, detectors
// and alarms sections as one JSON object whose keys are the dotted config
// keys (detectors.air_trapping.n), sorted, with JSON values: numbers in
// their shortest form, durations in nanoseconds, sizes in bytes. Two
// configurations with the same values give the same bytes however they were
// written (file, environment, flags, order, units).
func CanonicalAnalysis(a analyze.Config, d analyze.DetectorConfig, l alerts.LifecycleConfig) []byte {
	c := Config{Analysis: a, Detectors: d, Alarms: l}
	m := map[string]json.RawMessage{}
	walkLeaves(reflect.ValueOf(&c).Elem(), "", func(key string, v reflect.Value) {
		if !inSections(key, DigestSections) || !v.IsValid() {
			return
		}
		b, err := json.Marshal(v.Interface())
		if err != nil { // a value JSON cannot hold, such as NaN
			b, _ = json.Marshal(fmt.Sprint(v.Interface()))
		}
		m[key] = b
	})
	out, _ := json.Marshal(m) // map keys are sorted by encoding/json
	return out
}

// inSections reports whether a dotted key lies in one of the sections.
func inSections(key string, sections []string) bool {
	for _, s := range sections {
		if key == s || strings.HasPrefix(key, s+".") {
			return true
		}
	}
	return false
}
