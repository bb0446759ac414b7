package alerts

import (
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

func TestSubjects(t *testing.T) {
	for _, tc := range []struct {
		name string
		got  string
		want string
	}{
		{"default prefix alert", Subjects{}.Alert("bed-1"), "trapline.alert.bed-1"},
		{"breath", Subjects{"trapline"}.Breath("bench-a"), "trapline.breath.bench-a"},
		{"status", Subjects{"trapline"}.Status("bench-a"), "trapline.status.bench-a"},
		{"samples", Subjects{"trapline"}.Samples("bench-a"), "trapline.samples.bench-a"},
		{"ack", Subjects{"trapline"}.Ack("bench-a"), "trapline.ack.bench-a"},
		{"multi-token prefix", Subjects{"site3.icu"}.Alert("bed_12"), "site3.icu.alert.bed_12"},
		{"all alerts", Subjects{"trapline"}.All(KindAlert), "trapline.alert.>"},
		{"dotted stream id", Subjects{}.Alert("ward.4"), "trapline.alert.ward_4"},
		{"wildcards and space", Subjects{}.Breath("a*b> c"), "trapline.breath.a_b__c"},
		{"empty stream id", Subjects{}.Status(""), "trapline.status._"},
		{"non-ASCII kept", Subjects{}.Alert("lit-ä"), "trapline.alert.lit-ä"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if tc.got != tc.want {
				t.Errorf("got %q, want %q", tc.got, tc.want)
			}
		})
	}
}

func TestValidatePrefix(t *testing.T) {
	for _, tc := range []struct {
		prefix string
		ok     bool
	}{
		{"trapline", true},
		{"site3.icu", true},
		{"", false},
		{"a..b", false},
		{".a", false},
		{"a.*", false},
		{"a.>", false},
		{"a b", false},
	} {
		t.Run(tc.prefix, func(t *testing.T) {
			if err := ValidatePrefix(tc.prefix); (err == nil) != tc.ok {
				t.Errorf("ValidatePrefix(%q) = %v, want ok=%v", tc.prefix, err, tc.ok)
			}
		})
	}
}

func TestStreamsConfigDefaultsAndValidate(t *testing.T) {
	d := StreamsConfig{Prefix: "site-3.icu"}.WithDefaults()
	if d.Alerts != "SITE_3_ICU_ALERTS" || d.Breaths != "SITE_3_ICU_BREATHS" {
		t.Errorf("default names %q %q", d.Alerts, d.Breaths)
	}
	if d.AlertsDuplicates != 10*time.Minute || d.Replicas != 1 {
		t.Errorf("defaults %+v", d)
	}
	if err := d.Validate(); err != nil {
		t.Errorf("defaults do not validate: %v", err)
	}
	bad := StreamsConfig{
		Prefix: "a.>", Alerts: "X", Breaths: "X",
		AlertsDuplicates: time.Hour, AlertsMaxAge: time.Minute, Replicas: 7,
	}.WithDefaults()
	err := bad.Validate()
	if err == nil {
		t.Fatal("bad config validated")
	}
	// Every problem is reported at once.
	for _, want := range []string{"prefix", "share the name", "exceeds max age", "replicas"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not mention %q", err, want)
		}
	}
}

// TestEnsureStreams checks the streams on a real server: created with the
// configured limits, updated in place on a second call, and de-duplicating
// by message id inside the window (the JetStream behaviour the publisher
// relies on).
func TestEnsureStreams(t *testing.T) {
	ns := startTestNATS(t)
	nc := ns.connect(t)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	cfg := testStreams("")
	if err := EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatal(err)
	}
	cfg.BreathsMaxAge = 48 * time.Hour
	if err := EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatalf("update: %v", err)
	}
	for _, tc := range []struct {
		name     string
		subject  string
		storage  jetstream.StorageType
		dup      time.Duration
		maxAge   time.Duration
		maxBytes int64
		persist  jetstream.PersistModeType
	}{
		{"TRAPLINE_ALERTS", "trapline.alert.>", jetstream.FileStorage, 10 * time.Minute, DefaultAlertsMaxAge, 32 << 20, jetstream.DefaultPersistMode},
		{"TRAPLINE_BREATHS", "trapline.breath.>", jetstream.FileStorage, 0, 48 * time.Hour, 32 << 20, jetstream.AsyncPersistMode},
	} {
		t.Run(tc.name, func(t *testing.T) {
			st, err := js.Stream(t.Context(), tc.name)
			if err != nil {
				t.Fatal(err)
			}
			c := st.CachedInfo().Config
			if len(c.Subjects) != 1 || c.Subjects[0] != tc.subject {
				t.Errorf("subjects %v, want [%s]", c.Subjects, tc.subject)
			}
			if c.Storage != tc.storage || c.MaxAge != tc.maxAge || c.MaxBytes != tc.maxBytes || c.PersistMode != tc.persist {
				t.Errorf("config storage %v maxage %v maxbytes %d persist %v", c.Storage, c.MaxAge, c.MaxBytes, c.PersistMode)
			}
			if tc.dup > 0 && c.Duplicates != tc.dup {
				t.Errorf("duplicates window %v, want %v", c.Duplicates, tc.dup)
			}
		})
	}
	for i, wantDup := range []bool{false, true} {
		ack, err := js.Publish(t.Context(), "trapline.alert.bed-1", []byte("{}"), jetstream.WithMsgID("bed-1/x/1#raised"))
		if err != nil {
			t.Fatal(err)
		}
		if ack.Duplicate != wantDup {
			t.Errorf("publish %d: duplicate %v, want %v", i, ack.Duplicate, wantDup)
		}
	}
	if err := EnsureStreams(t.Context(), js, StreamsConfig{Prefix: "a..b"}); err == nil {
		t.Error("invalid prefix accepted")
	}
}

// TestPartitionSubjects checks the scale-out subjects against the layout
// the scale-out worker reads: <prefix>.samples.<partition>.<stream>.
func TestPartitionSubjects(t *testing.T) {
	s := Subjects{Prefix: "lab.icu"}
	for _, tc := range []struct{ got, want string }{
		{s.Each(KindSamples), "lab.icu.samples.*"},
		{s.SamplesPartition(3), "lab.icu.samples.3.*"},
		{s.SamplesPartition(-1), "lab.icu.samples.*.*"},
		{s.SamplesPartitionTransform(8), "lab.icu.samples.{{partition(8,1)}}.{{wildcard(1)}}"},
		{Subjects{}.Samples("bed-1"), "trapline.samples.bed-1"},
	} {
		if tc.got != tc.want {
			t.Errorf("got %q, want %q", tc.got, tc.want)
		}
	}
	for _, tc := range []struct {
		subject string
		p       int
		stream  string
		ok      bool
	}{
		{"lab.icu.samples.3.bed-1", 3, "bed-1", true},
		{"lab.icu.samples.x.bed-1", 0, "bed-1", false},
		{"lab.icu.samples.bed-1", 0, "", false},
		{"other.samples.3.bed-1", 0, "", false},
	} {
		p, stream, ok := s.PartitionOf(tc.subject)
		if ok != tc.ok || (ok && (p != tc.p || stream != tc.stream)) {
			t.Errorf("PartitionOf(%q) = %d, %q, %v; want %d, %q, %v", tc.subject, p, stream, ok, tc.p, tc.stream, tc.ok)
		}
	}
}
