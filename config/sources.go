package config

import (
	"fmt"
	"path"
	"strings"
	"time"

	"github.com/go-viper/mapstructure/v2"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// Source is a multiplexed source: one link that carries many streams, each
// told apart by the stream column of text input, the stream id of binary
// frames or the last token of a NATS subject. A stream id the source admits
// (by Pattern or Allow) gets its own pipeline, created when its first sample
// arrives; an id it does not admit is refused and counted. This is how a
// ward of beds on one link needs one entry rather than one per bed.
type Source struct {
	// Name identifies the source in logs, metrics and readiness checks.
	Name string `mapstructure:"name"`
	// URL is where samples come from, as for a stream's source.
	URL string `mapstructure:"source"`
	// Columns is the header assumed for text input without a header line.
	Columns string `mapstructure:"columns"`
	// SampleRateHz gives sample times when there is no time column.
	SampleRateHz float64 `mapstructure:"sample_rate_hz"`
	// Pattern is a glob over the whole stream id ("bed-*", "icu-?"); ids it
	// matches are admitted. Empty leaves admission to Allow.
	Pattern string `mapstructure:"pattern"`
	// Allow lists ids admitted one by one.
	Allow []string `mapstructure:"allow"`
	// MaxStreams is the most streams the source carries at once; further
	// ids are refused and counted. 0 means 1024.
	MaxStreams int `mapstructure:"max_streams"`
	// BatchWindow lets each network connection of the source hold its
	// streams' samples for up to this long and hand them to the analysis
	// together (ingest.Options.Hold): less CPU per sample with thousands of
	// streams, for at most this much more delay. 0 (the default) hands on
	// every read at once.
	BatchWindow time.Duration `mapstructure:"batch_window"`
	// Analysis, Detectors and Alarms override keys of the sections of the
	// same names for the streams of this source only; what they leave out
	// keeps the value of the section.
	Analysis  map[string]any `mapstructure:"analysis" overrides:"Analysis"`
	Detectors map[string]any `mapstructure:"detectors" overrides:"Detectors"`
	Alarms    map[string]any `mapstructure:"alarms" overrides:"Alarms"`
}

// DefaultMaxStreams is a source's maximum number of streams when
// max_streams is 0.
const DefaultMaxStreams = 1024

// Streams returns the maximum number of streams of the source.
func (s Source) Streams() int {
	if s.MaxStreams <= 0 {
		return DefaultMaxStreams
	}
	return s.MaxStreams
}

// Admission returns the admission policy of the source's stream ids.
func (s Source) Admission() ingest.AdmissionPolicy {
	return ingest.AdmissionPolicy{
		Templates:  []ingest.StreamTemplate{{Name: s.Name, Pattern: s.Pattern, Allow: s.Allow}},
		MaxStreams: s.Streams(),
	}
}

// SourceSettings are the analysis settings of the streams of one source:
// the sections of the configuration with the source's overrides applied.
type SourceSettings struct {
	Analysis  analyze.Config
	Detectors analyze.DetectorConfig
	Alarms    alerts.LifecycleConfig
}

// Settings returns the settings of the streams of source i. The
// configuration was validated, so the overrides decode.
func (c *Config) Settings(i int) (SourceSettings, error) {
	st := SourceSettings{Analysis: c.Analysis, Detectors: c.Detectors, Alarms: c.Alarms}
	s := c.Sources[i]
	key := fmt.Sprintf("sources[%d]", i)
	if err := override(s.Analysis, &st.Analysis); err != nil {
		return st, fmt.Errorf("%s.analysis: %w", key, err)
	}
	if err := override(s.Detectors, &st.Detectors); err != nil {
		return st, fmt.Errorf("%s.detectors: %w", key, err)
	}
	if err := override(s.Alarms, &st.Alarms); err != nil {
		return st, fmt.Errorf("%s.alarms: %w", key, err)
	}
	return st, nil
}

// override decodes the keys of m onto out, refusing keys out does not have.
func override(m map[string]any, out any) error {
	if len(m) == 0 {
		return nil
	}
	dec, err := mapstructure.NewDecoder(&mapstructure.DecoderConfig{
		Result:      out,
		ErrorUnused: true,
		DecodeHook: mapstructure.ComposeDecodeHookFunc(
			durationHook, sizeHook, mapstructure.TextUnmarshallerHookFunc()),
	})
	if err != nil {
		return err
	}
	return dec.Decode(m)
}

// validateSources checks each multiplexed source: a unique name, a URL, a
// way to admit ids, a sane maximum, overrides that decode and validate.
func (c *Config) validateSources(p *problems) {
	names := map[string]int{}
	for i, s := range c.Sources {
		key := fmt.Sprintf("sources[%d]", i)
		switch j, dup := names[s.Name]; {
		case s.Name == "":
			p.addf(key+".name", "must not be empty")
		case dup:
			p.addf(key+".name", "%q is already the name of sources[%d]", s.Name, j)
		default:
			names[s.Name] = i
		}
		if _, err := ingest.ParseURL(s.URL); err != nil {
			p.addf(key+".source", "%s", strings.TrimPrefix(err.Error(), ingest.ErrBadURL.Error()+": "))
		}
		if s.Pattern == "" && len(s.Allow) == 0 {
			p.addf(key+".pattern", "want a pattern (bed-*) or an allow list of ids")
		}
		if _, err := path.Match(s.Pattern, ""); err != nil {
			p.addf(key+".pattern", "%q: %v", s.Pattern, err)
		}
		for k, id := range s.Allow {
			if !ingest.ValidStreamID(id) {
				p.addf(fmt.Sprintf("%s.allow[%d]", key, k), "%q is not a valid stream id (want 1 to 32 letters, digits, '-' or '_')", id)
			}
		}
		if s.BatchWindow < 0 || s.BatchWindow > time.Second {
			p.addf(key+".batch_window", "%v is out of range (want 0 to 1s)", s.BatchWindow)
		}
		if s.MaxStreams < 0 || s.MaxStreams > 100_000 {
			p.addf(key+".max_streams", "%d is out of range (want 0 for %d, up to 100000)", s.MaxStreams, DefaultMaxStreams)
		}
		st, err := c.Settings(i)
		if err != nil {
			// An override that does not decode names an unknown key or a
			// value of the wrong type, which loading reports by key.
			continue
		}
		p.add(st.Analysis.Validate(key + ".analysis")...)
		p.add(st.Detectors.Validate(key + ".detectors")...)
		p.add(st.Alarms.Validate(key + ".alarms")...)
	}
}
