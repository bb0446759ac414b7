package simulator

import (
	"errors"
	"fmt"
	"reflect"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"

	"trapline/config/keyhint"
)

// The messages of yaml.TypeError that ExplainYAML rewrites.
var (
	yamlUnknownField = regexp.MustCompile(`^line (\d+): field (\S+) not found in type (\S+)$`)
	yamlBadValue     = regexp.MustCompile("^line (\\d+): cannot unmarshal !!(\\w+) `(.*)` into (\\S+)$")
)

// ExplainYAML rewrites the type errors of decoding data into a value of
// type root so that they speak of keys, not Go types: each unknown key is
// named by its path with the nearest known key suggested, and each value of
// the wrong kind by its key and what was wanted, e.g.
//
//	line 3: patient.resistanse: unknown key (did you mean "resistance"?)
//	line 5: ventilator.rate_bpm: want a number, got "fast"
//
// Other errors are returned as they are.
func ExplainYAML(err error, data []byte, root reflect.Type) error {
	var te *yaml.TypeError
	if !errors.As(err, &te) {
		return err
	}
	var doc yaml.Node
	if yaml.Unmarshal(data, &doc) != nil {
		return err
	}
	paths := map[int][]yamlKey{}
	collectKeys(&doc, "", paths)
	msgs := make([]string, len(te.Errors))
	for i, m := range te.Errors {
		msgs[i] = explainOne(m, paths, root)
	}
	return errors.New(strings.Join(msgs, "; "))
}

// yamlKey is one key of a YAML document: its dotted path and, for a
// scalar value, the value's text and line.
type yamlKey struct {
	path, value string
}

// collectKeys records, by line, the path of every key and of every scalar
// value.
func collectKeys(n *yaml.Node, path string, out map[int][]yamlKey) {
	switch n.Kind {
	case yaml.DocumentNode:
		for _, c := range n.Content {
			collectKeys(c, path, out)
		}
	case yaml.MappingNode:
		for i := 0; i+1 < len(n.Content); i += 2 {
			k, v := n.Content[i], n.Content[i+1]
			p := k.Value
			if path != "" {
				p = path + "." + k.Value
			}
			out[k.Line] = append(out[k.Line], yamlKey{path: p})
			if v.Kind == yaml.ScalarNode {
				out[v.Line] = append(out[v.Line], yamlKey{path: p, value: v.Value})
			}
			collectKeys(v, p, out)
		}
	case yaml.SequenceNode:
		for i, c := range n.Content {
			p := path + "[" + strconv.Itoa(i) + "]"
			if c.Kind == yaml.ScalarNode {
				out[c.Line] = append(out[c.Line], yamlKey{path: p, value: c.Value})
			}
			collectKeys(c, p, out)
		}
	}
}

// explainOne rewrites one message of a yaml.TypeError.
func explainOne(msg string, paths map[int][]yamlKey, root reflect.Type) string {
	if m := yamlUnknownField.FindStringSubmatch(msg); m != nil {
		line, _ := strconv.Atoi(m[1])
		path := m[2]
		for _, k := range paths[line] {
			if k.value == "" && (k.path == m[2] || strings.HasSuffix(k.path, "."+m[2])) {
				path = k.path
			}
		}
		hint := ""
		if t := findType(root, m[3], map[reflect.Type]bool{}); t != nil {
			names := yamlFields(t)
			if best, ok := keyhint.Nearest(m[2], names); ok {
				hint = fmt.Sprintf(" (did you mean %q?)", best)
			} else if len(names) <= 12 {
				hint = " (want one of " + strings.Join(names, ", ") + ")"
			}
		}
		return fmt.Sprintf("line %s: %s: unknown key%s", m[1], path, hint)
	}
	if m := yamlBadValue.FindStringSubmatch(msg); m != nil {
		line, _ := strconv.Atoi(m[1])
		where := ""
		for _, k := range paths[line] {
			if k.value == m[3] {
				where = k.path + ": "
			}
		}
		return fmt.Sprintf("line %s: %swant %s, got %q", m[1], where, wantOf(m[4]), m[3])
	}
	return msg
}

// wantOf says in words what a Go type named in a yaml message looks like.
func wantOf(goType string) string {
	switch {
	case strings.HasPrefix(goType, "float"):
		return "a number"
	case strings.HasPrefix(goType, "int") || strings.HasPrefix(goType, "uint"):
		return "a whole number"
	case goType == "bool":
		return "true or false"
	case goType == "string":
		return "text"
	case strings.HasPrefix(goType, "[]"):
		return "a list"
	case strings.HasPrefix(goType, "map["):
		return "a mapping"
	}
	return "a value of another kind"
}

// findType finds the struct type named name among the types reachable
// from t.
func findType(t reflect.Type, name string, seen map[reflect.Type]bool) reflect.Type {
	for t.Kind() == reflect.Pointer || t.Kind() == reflect.Slice || t.Kind() == reflect.Map {
		t = t.Elem()
	}
	if t.Kind() != reflect.Struct || seen[t] {
		return nil
	}
	seen[t] = true
	if t.String() == name {
		return t
	}
	for i := 0; i < t.NumField(); i++ {
		if f := findType(t.Field(i).Type, name, seen); f != nil {
			return f
		}
	}
	return nil
}

// yamlFields lists the keys of a struct type as the YAML decoder knows
// them, inline structs included.
func yamlFields(t reflect.Type) []string {
	var out []string
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		if !f.IsExported() {
			continue
		}
		name, opts, _ := strings.Cut(f.Tag.Get("yaml"), ",")
		switch {
		case name == "-":
		case strings.Contains(opts, "inline") && f.Type.Kind() == reflect.Struct:
			out = append(out, yamlFields(f.Type)...)
		case name == "":
			out = append(out, strings.ToLower(f.Name))
		default:
			out = append(out, name)
		}
	}
	return out
}
