package cli

import (
	"strings"
	"testing"
)

func TestConfigLogger(t *testing.T) {
	for _, tc := range []struct {
		level, format string
		wantErr       bool
		want          string
	}{
		{"info", "json", false, `"message":"hello"`},
		{"info", "console", false, "INF hello"},
		{"warn", "json", false, ""},
		{"info", "xml", true, ""},
		{"loud", "json", true, ""},
	} {
		t.Run(tc.level+"/"+tc.format, func(t *testing.T) {
			var b strings.Builder
			log, err := configLogger(&b, tc.level, tc.format)
			if (err != nil) != tc.wantErr {
				t.Fatalf("err = %v, want error %v", err, tc.wantErr)
			}
			if err != nil {
				return
			}
			log.Info().Msg("hello")
			if got := b.String(); tc.want == "" && got != "" || !strings.Contains(got, tc.want) {
				t.Errorf("output %q, want %q", got, tc.want)
			}
		})
	}
}
