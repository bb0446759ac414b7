package config

import (
	"reflect"
	"strings"
	"testing"
)

func TestSources(t *testing.T) {
	for _, tc := range []struct {
		name string
		yaml string
		want []string
	}{
		{
			name: "a ward on one link",
			yaml: "sources:\n  - name: ward-a\n    source: tcp-listen://127.0.0.1:7400\n    pattern: bed-*\n    max_streams: 500\n",
		},
		{
			name: "every problem by key",
			yaml: `sources:
  - name: ""
    source: "tcp://nohost"
  - name: b
    source: "stdin:"
    pattern: "bed-["
    allow: ["no spaces"]
    max_streams: -1
  - name: b
    source: "stdin:"
    pattern: "*"
    detectors:
      air_trapping:
        nn: 3
`,
			want: []string{
				`sources[2].detectors.air_trapping.nn: unknown key (did you mean "n"?)`,
				`sources[0].name: must not be empty`,
				`sources[0].source: tcp address "nohost": want host:port, e.g. tcp://127.0.0.1:4001`,
				`sources[0].pattern: want a pattern (bed-*) or an allow list of ids`,
				`sources[1].pattern: "bed-[": syntax error in pattern`,
				`sources[1].allow[0]: "no spaces" is not a valid stream id (want 1 to 32 letters, digits, '-' or '_')`,
				`sources[1].max_streams: -1 is out of range (want 0 for 1024, up to 100000)`,
				`sources[2].name: "b" is already the name of sources[1]`,
			},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := LoadBytes([]byte(tc.yaml), "yaml", nil)
			if tc.want == nil {
				if err != nil {
					t.Fatalf("want no problem, got %v", err)
				}
				return
			}
			got := problemLines(t, err)
			if !reflect.DeepEqual(got, tc.want) {
				t.Errorf("problems:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(tc.want, "\n"))
			}
		})
	}
}

// An override changes the key it names for the streams of its source and
// leaves every other key, and the section itself, as it was.
func TestSourceOverrides(t *testing.T) {
	c, err := LoadBytes([]byte("sources:\n  - name: w\n    source: stdin://\n    pattern: '*'\n"+
		"    detectors:\n      air_trapping:\n        n: 2\n    alarms:\n      conditions:\n        air_trapping:\n          delay_breaths: 1\n"), "yaml", nil)
	if err != nil {
		t.Fatal(err)
	}
	st, err := c.Settings(0)
	if err != nil {
		t.Fatal(err)
	}
	if st.Detectors.AirTrapping.N != 2 || c.Detectors.AirTrapping.N != Default().Detectors.AirTrapping.N {
		t.Errorf("override n: source %d, section %d", st.Detectors.AirTrapping.N, c.Detectors.AirTrapping.N)
	}
	want := Default().Detectors
	want.AirTrapping.N = 2
	if !reflect.DeepEqual(st.Detectors, want) {
		t.Errorf("other detector keys changed:\n%+v\nwant\n%+v", st.Detectors, want)
	}
	if !reflect.DeepEqual(st.Analysis, c.Analysis) {
		t.Error("analysis changed without an override")
	}
}
