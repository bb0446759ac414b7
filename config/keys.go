package config

import (
	"encoding"
	"fmt"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"time"

	"trapline/config/keyhint"
)

// EnvPrefix starts every environment variable that sets a key.
const EnvPrefix = "TRAPLINE_"

// EnvName returns the environment variable for a key: the prefix, then the
// key in upper case with dots replaced by underscores, so nats.embedded.port
// is TRAPLINE_NATS_EMBEDDED_PORT.
func EnvName(key string) string {
	return EnvPrefix + strings.ToUpper(strings.ReplaceAll(key, ".", "_"))
}

// FlagName returns the command-line flag that Load maps to a key: the key
// with dots and underscores replaced by dashes, so nats.url is --nats-url and
// data_dir is --data-dir.
func FlagName(key string) string {
	return strings.NewReplacer(".", "-", "_", "-").Replace(key)
}

// Keys returns every key that has a default value (every settable key except
// the items of lists such as streams), in the order of the example file.
func Keys() []string {
	var keys []string
	walkLeaves(reflect.ValueOf(Default()).Elem(), "", func(key string, _ reflect.Value) {
		keys = append(keys, key)
	})
	return keys
}

// textUnmarshaler is the interface of types that read themselves from a
// string (a leaf, even when the type is a struct).
var textUnmarshaler = reflect.TypeFor[encoding.TextUnmarshaler]()

// isLeaf reports whether values of t are written as one scalar in a config
// file.
func isLeaf(t reflect.Type) bool {
	if t == reflect.TypeFor[time.Duration]() || reflect.PointerTo(t).Implements(textUnmarshaler) {
		return true
	}
	switch t.Kind() {
	case reflect.Struct, reflect.Map, reflect.Slice, reflect.Array:
		return false
	}
	return true
}

// field is one config key of a struct type.
type field struct {
	name  string
	index []int
	typ   reflect.Type
}

// fieldsOf lists the keys of struct type t the way mapstructure decodes
// them: the mapstructure tag's name, or the field name; squashed embedded
// structs contribute their own fields.
func fieldsOf(t reflect.Type) []field {
	var out []field
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		if !f.IsExported() {
			continue
		}
		tag := f.Tag.Get("mapstructure")
		name, opts, _ := strings.Cut(tag, ",")
		if name == "-" {
			continue
		}
		if strings.Contains(opts, "squash") && f.Type.Kind() == reflect.Struct {
			for _, g := range fieldsOf(f.Type) {
				g.index = append([]int{i}, g.index...)
				out = append(out, g)
			}
			continue
		}
		if name == "" {
			name = f.Name
		}
		typ := f.Type
		if sec := f.Tag.Get("overrides"); sec != "" {
			// An override section is checked against the section it
			// overrides.
			if g, ok := reflect.TypeFor[Config]().FieldByName(sec); ok {
				typ = g.Type
			}
		}
		out = append(out, field{name: name, index: []int{i}, typ: typ})
	}
	return out
}

// joinKey appends a key to a path.
func joinKey(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

// walkLeaves calls fn for every scalar setting below v, with its full key.
// Empty lists and maps are skipped: they have no keys to name. A nil pointer
// (an optional override) is a key without a default: fn gets the zero
// reflect.Value for it.
func walkLeaves(v reflect.Value, path string, fn func(key string, v reflect.Value)) {
	t := v.Type()
	if t.Kind() == reflect.Pointer {
		if v.IsNil() {
			if isLeaf(t.Elem()) {
				fn(path, reflect.Value{})
			} else {
				walkLeaves(reflect.New(t.Elem()).Elem(), path, func(key string, _ reflect.Value) {
					fn(key, reflect.Value{})
				})
			}
			return
		}
		v, t = v.Elem(), t.Elem()
	}
	switch {
	case isLeaf(t):
		fn(path, v)
	case t.Kind() == reflect.Struct:
		for _, f := range fieldsOf(t) {
			walkLeaves(v.FieldByIndex(f.index), joinKey(path, strings.ToLower(f.name)), fn)
		}
	case t.Kind() == reflect.Map:
		keys := v.MapKeys()
		sort.Slice(keys, func(i, j int) bool { return fmt.Sprint(keys[i]) < fmt.Sprint(keys[j]) })
		for _, k := range keys {
			walkLeaves(v.MapIndex(k), joinKey(path, strings.ToLower(fmt.Sprint(k))), fn)
		}
	case t.Kind() == reflect.Slice || t.Kind() == reflect.Array:
		if v.Len() > 0 {
			fn(path, v)
		}
	}
}

// checkKeys walks a parsed config tree against type t and reports every key
// that t does not have to unknown, and every place where a mapping or a list
// stands where the other (or a scalar) belongs to shape. Scalar type errors
// are left to the decoder, which names them with the same paths. The tree is
// viper's view of the file, which drops empty mappings: an unknown key whose
// value is {} goes unreported, and has no effect either.
func checkKeys(raw any, t reflect.Type, path string, unknown, shape *problems) {
	p := shape
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	if raw == nil {
		return
	}
	switch {
	case isLeaf(t):
		switch raw.(type) {
		case map[string]any:
			p.addf(path, "want %s, got a mapping", describeType(t))
		case []any:
			if t.Kind() != reflect.Slice {
				p.addf(path, "want %s, got a list", describeType(t))
			}
		}
	case t.Kind() == reflect.Struct:
		m, ok := raw.(map[string]any)
		if !ok {
			p.addf(path, "want a mapping of keys, got %s", describeValue(raw))
			return
		}
		fields := fieldsOf(t)
		for _, k := range sortedKeys(m) {
			f, ok := lookupField(fields, k)
			if !ok {
				unknown.addf(joinKey(path, k), "unknown key%s", suggest(k, fields))
				continue
			}
			checkKeys(m[k], f.typ, joinKey(path, k), unknown, shape)
		}
	case t.Kind() == reflect.Map:
		m, ok := raw.(map[string]any)
		if !ok {
			p.addf(path, "want a mapping, got %s", describeValue(raw))
			return
		}
		for _, k := range sortedKeys(m) {
			checkKeys(m[k], t.Elem(), joinKey(path, k), unknown, shape)
		}
	case t.Kind() == reflect.Slice || t.Kind() == reflect.Array:
		l, ok := raw.([]any)
		if !ok {
			if !isLeaf(t.Elem()) {
				p.addf(path, "want a list, got %s", describeValue(raw))
			}
			return
		}
		for i, item := range l {
			checkKeys(item, t.Elem(), path+"["+strconv.Itoa(i)+"]", unknown, shape)
		}
	}
}

// lookupField finds a field by key, ignoring case as the decoder does.
func lookupField(fields []field, key string) (field, bool) {
	for _, f := range fields {
		if strings.EqualFold(f.name, key) {
			return f, true
		}
	}
	return field{}, false
}

// sortedKeys returns the keys of m in order, so that reports are stable.
func sortedKeys(m map[string]any) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

// suggest returns ` (did you mean "x"?)` for the known key nearest to an
// unknown one, when it is near enough to be a typo, and otherwise lists the
// keys allowed at that level.
func suggest(key string, fields []field) string {
	best, bestD := "", 3
	names := make([]string, 0, len(fields))
	for _, f := range fields {
		names = append(names, f.name)
		if d := editDistance(strings.ToLower(key), strings.ToLower(f.name)); d < bestD {
			best, bestD = f.name, d
		}
	}
	if best != "" {
		return fmt.Sprintf(" (did you mean %q?)", best)
	}
	if len(names) <= 16 {
		return " (want one of " + strings.Join(names, ", ") + ")"
	}
	return ""
}

// editDistance is the Levenshtein distance between a and b (keyhint).
func editDistance(a, b string) int { return keyhint.Distance(a, b) }

// describeType names what a value of t looks like in a config file.
func describeType(t reflect.Type) string {
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	switch {
	case t == reflect.TypeFor[time.Duration]():
		return "a duration with a unit, like 10s or 5m"
	case t == reflect.TypeFor[Size]():
		return "a size, like 64MiB or 1GiB"
	}
	switch t.Kind() {
	case reflect.Bool:
		return "true or false"
	case reflect.Int, reflect.Int8, reflect.Int16, reflect.Int32, reflect.Int64,
		reflect.Uint, reflect.Uint8, reflect.Uint16, reflect.Uint32, reflect.Uint64:
		return "a whole number"
	case reflect.Float32, reflect.Float64:
		return "a number"
	case reflect.String:
		return "a string"
	case reflect.Slice, reflect.Array:
		return "a list"
	case reflect.Struct, reflect.Map:
		return "a mapping"
	}
	return t.String()
}

// describeValue shows a parsed value in a message, briefly.
func describeValue(v any) string {
	switch v := v.(type) {
	case nil:
		return "nothing"
	case map[string]any:
		return "a mapping"
	case []any:
		return "a list"
	case string:
		if len(v) > 40 {
			v = v[:40] + "..."
		}
		return strconv.Quote(v)
	default:
		s := fmt.Sprint(v)
		if len(s) > 40 {
			s = s[:40] + "..."
		}
		return s
	}
}
