package config

import (
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// fuzzFormats are the formats the fuzzer picks from.
var fuzzFormats = []string{"yaml", "toml", "json"}

// FuzzLoadBytes feeds arbitrary files to the loader. It must never panic;
// a configuration it accepts must validate; one it refuses must come back as
// *Errors with at least one problem.
func FuzzLoadBytes(f *testing.F) {
	seeds, _ := filepath.Glob("testdata/*")
	seeds = append(seeds, "trapline.example.yaml")
	for _, path := range seeds {
		b, err := os.ReadFile(path)
		if err != nil {
			f.Fatal(err)
		}
		format := strings.TrimPrefix(filepath.Ext(path), ".")
		f.Add(b, uint8(slices.Index(fuzzFormats, format)))
	}
	f.Fuzz(func(t *testing.T, data []byte, format uint8) {
		c, err := LoadBytes(data, fuzzFormats[int(format)%len(fuzzFormats)], nil)
		if err != nil {
			var errs *Errors
			if !errors.As(err, &errs) || len(errs.Problems) == 0 {
				t.Fatalf("error %v (%T) is not a non-empty *Errors", err, err)
			}
			return
		}
		if verr := c.Validate(); verr != nil {
			t.Fatalf("loaded configuration does not validate: %v", verr)
		}
	})
}
