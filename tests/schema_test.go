package tests

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"trapline/daemon/cli"
	"trapline/simulator"

	"go.yaml.in/yaml/v3"
)

// schemaNode is the part of JSON Schema (draft 2020-12) that the shipped
// schemas in docs/schema use: enough to check the records against them.
type schemaNode struct {
	Type                 any                    `json:"type"`
	Const                any                    `json:"const"`
	Enum                 []any                  `json:"enum"`
	Minimum              *float64               `json:"minimum"`
	MinLength            *int                   `json:"minLength"`
	Required             []string               `json:"required"`
	Properties           map[string]*schemaNode `json:"properties"`
	Items                *schemaNode            `json:"items"`
	AdditionalProperties json.RawMessage        `json:"additionalProperties"`
}

func loadSchema(t *testing.T, name string) *schemaNode {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join("..", "docs", "schema", name))
	if err != nil {
		t.Fatalf("read schema: %v", err)
	}
	var s schemaNode
	if err := json.Unmarshal(raw, &s); err != nil {
		t.Fatalf("parse schema %s: %v", name, err)
	}
	return &s
}

// jsonType names the JSON type of a value decoded by encoding/json with
// UseNumber.
func jsonType(v any) string {
	switch x := v.(type) {
	case nil:
		return "null"
	case bool:
		return "boolean"
	case string:
		return "string"
	case json.Number:
		if _, err := x.Int64(); err == nil && !strings.ContainsAny(string(x), ".eE") {
			return "integer"
		}
		return "number"
	case []any:
		return "array"
	case map[string]any:
		return "object"
	}
	return fmt.Sprintf("%T", v)
}

func typeAllowed(want any, got string) bool {
	var names []string
	switch w := want.(type) {
	case nil:
		return true
	case string:
		names = []string{w}
	case []any:
		for _, n := range w {
			names = append(names, fmt.Sprint(n))
		}
	}
	return slices.Contains(names, got) || (got == "integer" && slices.Contains(names, "number"))
}

// check returns every way v breaks s, each prefixed with its path.
func (s *schemaNode) check(path string, v any) []string {
	var bad []string
	got := jsonType(v)
	if !typeAllowed(s.Type, got) {
		bad = append(bad, fmt.Sprintf("%s: type %s, want %v", path, got, s.Type))
		return bad
	}
	if s.Const != nil && fmt.Sprint(s.Const) != fmt.Sprint(v) {
		bad = append(bad, fmt.Sprintf("%s: %v, want %v", path, v, s.Const))
	}
	if len(s.Enum) > 0 && !slices.ContainsFunc(s.Enum, func(e any) bool { return fmt.Sprint(e) == fmt.Sprint(v) }) {
		bad = append(bad, fmt.Sprintf("%s: %v not one of %v", path, v, s.Enum))
	}
	if n, ok := v.(json.Number); ok && s.Minimum != nil {
		if f, _ := n.Float64(); f < *s.Minimum {
			bad = append(bad, fmt.Sprintf("%s: %v below %v", path, f, *s.Minimum))
		}
	}
	if str, ok := v.(string); ok && s.MinLength != nil && len(str) < *s.MinLength {
		bad = append(bad, fmt.Sprintf("%s: shorter than %d", path, *s.MinLength))
	}
	switch x := v.(type) {
	case map[string]any:
		for _, k := range s.Required {
			if _, ok := x[k]; !ok {
				bad = append(bad, fmt.Sprintf("%s: missing %s", path, k))
			}
		}
		var extra *schemaNode
		if len(s.AdditionalProperties) > 0 && s.AdditionalProperties[0] == '{' {
			extra = new(schemaNode)
			if err := json.Unmarshal(s.AdditionalProperties, extra); err != nil {
				bad = append(bad, fmt.Sprintf("%s: schema additionalProperties: %v", path, err))
			}
		}
		for k, sub := range x {
			if p, ok := s.Properties[k]; ok {
				bad = append(bad, p.check(path+"."+k, sub)...)
			} else if extra != nil {
				bad = append(bad, extra.check(path+"."+k, sub)...)
			}
		}
	case []any:
		if s.Items != nil {
			for i, sub := range x {
				bad = append(bad, s.Items.check(fmt.Sprintf("%s[%d]", path, i), sub)...)
			}
		}
	}
	return bad
}

// TestRecordsMatchSchemas runs the shipped bronchospasm scenario, with an
// end-expiratory hold added, through
// `trapline sim` and `trapline analyze` and checks every breath record and
// alert event against the JSON Schemas shipped in docs/schema, and every
// property of the breath schema against what the records carry, so that the
// contract (docs/schema) and the schemas cannot drift apart.
func TestRecordsMatchSchemas(t *testing.T) {
	breathSchema := loadSchema(t, "breath.schema.json")
	alertSchema := loadSchema(t, "alert.schema.json")

	// The shipped scenario with an end-expiratory hold at its worst
	// trapping, so that the hold's properties carry values too.
	scen, err := simulator.Shipped("bronchospasm")
	if err != nil {
		t.Fatal(err)
	}
	scen.Timeline = append(scen.Timeline, simulator.Step{AtS: 600, Event: simulator.EventExpiratoryHold, DurationS: 4})
	data, err := yaml.Marshal(scen)
	if err != nil {
		t.Fatal(err)
	}
	scenario := filepath.Join(t.TempDir(), "bronchospasm-hold.yaml")
	if err := os.WriteFile(scenario, data, 0o644); err != nil {
		t.Fatal(err)
	}
	signal := filepath.Join(t.TempDir(), "bronchospasm.txt")
	var stderr bytes.Buffer
	if code := cli.Run(t.Context(), []string{"sim", "--scenario", scenario, "--speed", "max", "--out", signal},
		strings.NewReader(""), io.Discard, &stderr); code != cli.ExitOK {
		t.Fatalf("trapline sim exited %d: %s", code, stderr.String())
	}
	var out bytes.Buffer
	if code := cli.Run(t.Context(), []string{"analyze", signal}, strings.NewReader(""), &out, &stderr); code != cli.ExitOK {
		t.Fatalf("trapline analyze exited %d: %s", code, stderr.String())
	}

	counts := map[string]int{}
	seenKeys := map[string]bool{}
	sc := bufio.NewScanner(&out)
	sc.Buffer(make([]byte, 0, 64<<10), 1<<20)
	for line := 1; sc.Scan(); line++ {
		dec := json.NewDecoder(bytes.NewReader(sc.Bytes()))
		dec.UseNumber()
		var rec map[string]any
		if err := dec.Decode(&rec); err != nil {
			t.Fatalf("line %d is not JSON: %v", line, err)
		}
		typ, _ := rec["type"].(string)
		counts[typ]++
		var schema *schemaNode
		switch typ {
		case "breath":
			schema = breathSchema
			for k, v := range rec {
				if v != nil {
					seenKeys[k] = true
				}
			}
			for k, v := range rec {
				if n, ok := v.(json.Number); ok {
					if f, err := n.Float64(); err != nil || math.IsNaN(f) {
						t.Errorf("line %d: %s = %v is not a finite number", line, k, v)
					}
				}
			}
		case "alert":
			schema = alertSchema
		default:
			t.Fatalf("line %d: unknown record type %q", line, typ)
		}
		for _, p := range schema.check(typ, rec) {
			t.Errorf("line %d: %s", line, p)
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	t.Logf("records: %v", counts)
	// The scenario traps air and raises alerts, so both kinds must be there.
	if counts["breath"] < 100 || counts["alert"] < 2 {
		t.Fatalf("got %v records, want ≥ 100 breaths and ≥ 2 alerts", counts)
	}
	// Every numeric property of the schema is produced with a value on some
	// breath of this scenario except those that need a pause, pressure
	// control, a flow-dependent resistance or two time constants, which the
	// scenario does not have: a schema property no record carries would be
	// a contract that nothing honours.
	for k := range breathSchema.Properties {
		switch k {
		case "pplat_cmh2o", "r_occ_cmh2o_s_per_l", "c_stat_ml_per_cmh2o",
			"set_pinsp_cmh2o", "r_k1_cmh2o_s_per_l", "r_k2_cmh2o_s2_per_l2", "trapped_expfit_ml":
			continue
		}
		if !seenKeys[k] {
			t.Errorf("no breath record carries a value for schema property %s", k)
		}
	}
}
