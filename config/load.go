package config

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"time"

	"github.com/go-viper/mapstructure/v2"
	"github.com/spf13/pflag"
	"github.com/spf13/viper"
)

// formats maps config file extensions to viper's config types.
var formats = map[string]string{".yaml": "yaml", ".yml": "yaml", ".toml": "toml", ".json": "json"}

// Load reads the configuration in four layers, each overriding the one
// before: Default(), the file at path (YAML, TOML or JSON by its extension;
// no file when path is empty), TRAPLINE_* environment variables (see
// EnvName), and the flags in flags that were set on the command line and
// whose name is FlagName of a key (--data-dir, --nats-url, --http-listen,
// --log-level; other flags are ignored; flags may be nil).
//
// Every problem is reported at once in an *Errors: a file that cannot be
// read or parsed, unknown keys at any depth (streams[1].sourcee), values of
// the wrong type, and everything Validate finds.
func Load(path string, flags *pflag.FlagSet) (*Config, error) {
	c, _, err := loadFile(path, flags)
	return c, err
}

// loadFile is Load that also returns the layers the values came from.
func loadFile(path string, flags *pflag.FlagSet) (*Config, layers, error) {
	if path == "" {
		return load(nil, "", "", flags)
	}
	format, ok := formats[strings.ToLower(filepath.Ext(path))]
	if !ok {
		return nil, layers{}, &Errors{File: path, Problems: []error{&FieldError{
			Msg: fmt.Sprintf("unknown file type %q (want .yaml, .yml, .toml or .json)", filepath.Ext(path))}}}
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, layers{}, &Errors{File: path, Problems: []error{&FieldError{Msg: fmt.Sprintf("read config: %v", err)}}}
	}
	return load(data, format, path, flags)
}

// LoadBytes is Load for a configuration held in memory; format is yaml,
// toml or json.
func LoadBytes(data []byte, format string, flags *pflag.FlagSet) (*Config, error) {
	switch format {
	case "yaml", "toml", "json":
	default:
		return nil, &Errors{Problems: []error{&FieldError{
			Msg: fmt.Sprintf("unknown format %q (want yaml, toml or json)", format)}}}
	}
	c, _, err := load(data, format, "", flags)
	return c, err
}

// layers is what load knows of where values came from: the keys of the
// file and the keys set by flags (with the flag's name).
type layers struct {
	file     map[string]any
	fromFlag map[string]string
}

// load does the work of Load: parse, check keys, layer, decode, validate.
func load(data []byte, format, file string, flags *pflag.FlagSet) (*Config, layers, error) {
	var p problems

	raw := map[string]any{}
	if format != "" {
		fv := viper.New()
		fv.SetConfigType(format)
		if err := fv.ReadConfig(bytes.NewReader(data)); err != nil {
			p.addf("", "parse %s: %v", format, unwrapParse(err))
			return nil, layers{}, p.err(file)
		}
		raw = dropNulls(fv.AllSettings())
	}
	var shape problems
	checkKeys(raw, reflect.TypeFor[Config](), "", &p, &shape)
	p.list = append(p.list, shape.list...)
	reported := map[string]bool{}
	for _, e := range shape.list {
		reported[problemKey(e)] = true
	}

	v := viper.New()
	var leaves []string // in the order of the example file, for stable reports
	walkLeaves(reflect.ValueOf(Default()).Elem(), "", func(key string, val reflect.Value) {
		if val.IsValid() {
			v.SetDefault(key, val.Interface())
		}
		leaves = append(leaves, key)
	})
	if err := v.MergeConfigMap(raw); err != nil {
		p.addf("", "merge %s: %v", format, err)
		return nil, layers{}, p.err(file)
	}
	bindEnv(v, leaves, &p)
	fromFlag := bindFlags(v, leaves, flags, &p)

	var c Config
	err := v.Unmarshal(&c, viper.DecodeHook(mapstructure.ComposeDecodeHookFunc(
		durationHook, sizeHook, mapstructure.TextUnmarshallerHookFunc(),
	)))
	if err != nil {
		var dp problems
		decodeProblems(err, &dp)
		p.list = append(p.list, uncovered(dp.list, reported)...)
		for _, e := range dp.list {
			reported[problemKey(e)] = true
		}
	}
	// A value that did not decode is not validated again.
	var vp problems
	c.validate(&vp)
	p.list = append(p.list, uncovered(dropConsequences(vp.list, p.list), reported)...)
	for _, e := range p.list {
		var fe *FieldError
		if errors.As(e, &fe) && fe.Key != "" {
			fe.Msg += origin(fe.Key, fromFlag)
		}
	}
	if err := p.err(file); err != nil {
		return nil, layers{}, err
	}
	return &c, layers{file: raw, fromFlag: fromFlag}, nil
}

// bindEnv binds each leaf key to its environment variable, reporting to
// p a variable set but empty where an empty value is not meaningful.
func bindEnv(v *viper.Viper, leaves []string, p *problems) {
	v.AllowEmptyEnv(true)
	for _, key := range leaves {
		// An empty variable clears a string (TRAPLINE_HTTP_LISTEN= turns
		// HTTP off); for a number, a duration or a switch it is a mistake,
		// not a quiet zero.
		if val, ok := os.LookupEnv(EnvName(key)); ok && strings.TrimSpace(val) == "" {
			if t := keyType(reflect.TypeFor[Config](), key); t == nil || t.Kind() != reflect.String {
				p.addf(key, "is set but empty")
				continue
			}
		}
		if err := v.BindEnv(key, EnvName(key)); err != nil {
			p.addf(key, "bind %s: %v", EnvName(key), err)
		}
	}
}

// bindFlags binds each leaf key to the command-line flag of its name when
// that flag was set, and returns the flag names of the keys so bound.
func bindFlags(v *viper.Viper, leaves []string, flags *pflag.FlagSet, p *problems) map[string]string {
	fromFlag := map[string]string{}
	if flags != nil {
		byFlag := map[string]string{}
		for _, key := range leaves {
			byFlag[FlagName(key)] = key
		}
		flags.Visit(func(f *pflag.Flag) {
			key, ok := byFlag[f.Name]
			if !ok {
				return
			}
			if err := v.BindPFlag(key, f); err != nil {
				p.addf(key, "bind --%s: %v", f.Name, err)
				return
			}
			fromFlag[key] = f.Name
		})
	}
	return fromFlag
}

// keyType returns the type of the value at a dotted key below t, or nil.
func keyType(t reflect.Type, key string) reflect.Type {
	for _, part := range strings.Split(key, ".") {
		for t.Kind() == reflect.Pointer {
			t = t.Elem()
		}
		switch t.Kind() {
		case reflect.Struct:
			f, ok := lookupField(fieldsOf(t), part)
			if !ok {
				return nil
			}
			t = f.typ
		case reflect.Map:
			t = t.Elem()
		default:
			return nil
		}
	}
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	return t
}

// origin says where a bad value came from when that was not the file: a
// flag or an environment variable.
func origin(key string, fromFlag map[string]string) string {
	if f, ok := fromFlag[key]; ok {
		return " (from --" + f + ")"
	}
	if _, ok := os.LookupEnv(EnvName(key)); ok {
		return " (from " + EnvName(key) + ")"
	}
	return ""
}

// dropNulls removes keys whose value is null, at every depth, so that an
// empty section ("log:" with nothing under it) leaves the defaults in place
// instead of erasing them.
func dropNulls(m map[string]any) map[string]any {
	for k, v := range m {
		switch v := v.(type) {
		case nil:
			delete(m, k)
		case map[string]any:
			dropNulls(v)
		case []any:
			for _, item := range v {
				if im, ok := item.(map[string]any); ok {
					dropNulls(im)
				}
			}
		}
	}
	return m
}

// unwrapParse removes viper's wrapping of a parser error, which repeats
// itself, leaving the parser's message with its line number.
func unwrapParse(err error) error {
	for {
		u := errors.Unwrap(err)
		if u == nil {
			return err
		}
		err = u
	}
}

// durationHook decodes durations from strings with a unit ("10s", "1h30m").
// A bare number is refused: 10 would silently mean ten nanoseconds.
func durationHook(from, to reflect.Type, data any) (any, error) {
	if to != reflect.TypeFor[time.Duration]() || from == to {
		return data, nil
	}
	s, ok := data.(string)
	if !ok {
		return nil, fmt.Errorf("want a duration with a unit, like 10s or 5m, got %s", describeValue(data))
	}
	d, err := time.ParseDuration(strings.TrimSpace(s))
	if err != nil {
		return nil, fmt.Errorf("want a duration with a unit, like 10s or 5m, got %q", s)
	}
	return d, nil
}

// sizeHook decodes sizes from strings with a unit ("64MiB") or whole
// numbers of bytes.
func sizeHook(from, to reflect.Type, data any) (any, error) {
	if to == reflect.TypeFor[MemLimit]() && from != to {
		// memory_limit: "auto", or a size.
		if d, ok := data.(string); ok {
			return ParseMemLimit(d)
		}
		z, err := sizeHook(from, reflect.TypeFor[Size](), data)
		if err != nil {
			return nil, err
		}
		return MemLimit(z.(Size)), nil
	}
	if to != reflect.TypeFor[Size]() || from == to {
		return data, nil
	}
	switch d := data.(type) {
	case string:
		return ParseSize(d)
	case int:
		return sizeFromFloat(float64(d), fmt.Sprint(d))
	case int64:
		return sizeFromFloat(float64(d), fmt.Sprint(d))
	case uint64:
		if d > math.MaxInt64 {
			return nil, fmt.Errorf("size %d: out of range", d)
		}
		return Size(d), nil
	case float64:
		return sizeFromFloat(d, fmt.Sprint(d))
	}
	return nil, fmt.Errorf("want a size, like 64MiB or 1GiB, got %s", describeValue(data))
}

// decodeProblems turns the decoder's joined errors into one FieldError per
// key, with messages in the words of this package.
func decodeProblems(err error, p *problems) {
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		for _, e := range j.Unwrap() {
			decodeProblems(e, p)
		}
		return
	}
	de, ok := err.(*mapstructure.DecodeError)
	if !ok {
		if u := errors.Unwrap(err); u != nil {
			decodeProblems(u, p)
			return
		}
		p.addf("", "%v", err)
		return
	}
	inner := de.Unwrap()
	var nested *mapstructure.DecodeError
	if _, ok := inner.(interface{ Unwrap() []error }); ok || errors.As(inner, &nested) {
		decodeProblems(inner, p)
		return
	}
	var pe *mapstructure.ParseError
	var ue *mapstructure.UnconvertibleTypeError
	switch {
	case errors.As(inner, &pe):
		p.addf(de.Name(), "want %s, got %s", describeType(pe.Expected.Type()), describeValue(pe.Value))
	case errors.As(inner, &ue):
		p.addf(de.Name(), "want %s, got %s", describeType(ue.Expected.Type()), describeValue(ue.Value))
	default:
		p.addf(de.Name(), "%v", inner)
	}
}

// problemKey returns the key a problem is about: a FieldError's key, or the
// text before the first ": " of another package's error.
func problemKey(err error) string {
	var fe *FieldError
	if errors.As(err, &fe) {
		return fe.Key
	}
	k, _, _ := strings.Cut(err.Error(), ": ")
	return k
}

// uncovered returns the problems whose key, and every key above it, has
// no problem reported yet.
func uncovered(list []error, reported map[string]bool) []error {
	var out []error
	for _, e := range list {
		if !coveredBy(problemKey(e), reported) {
			out = append(out, e)
		}
	}
	return out
}

// coveredBy reports whether key, or a key above it, is in reported.
func coveredBy(key string, reported map[string]bool) bool {
	for r := range reported {
		if r != "" && (key == r || strings.HasPrefix(key, r+".") || strings.HasPrefix(key, r+"[")) {
			return true
		}
	}
	return false
}
