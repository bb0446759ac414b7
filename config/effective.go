package config

import (
	"encoding/json"
	"fmt"
	"io"
	"net/url"
	"os"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/pflag"
	"go.yaml.in/yaml/v3"
)

// Origin is the layer a configuration value came from.
type Origin string

// The layers, each overriding the one before (see Load).
const (
	OriginDefault Origin = "default"
	OriginFile    Origin = "file"
	OriginEnv     Origin = "env"
	OriginFlag    Origin = "flag"
)

// Setting is one key of the effective configuration.
type Setting struct {
	// Key is the dotted key (nats.embedded.port, streams[0].source).
	Key string `json:"key" yaml:"key"`
	// Value is the effective value as it would be written in a file;
	// passwords and tokens are hidden.
	Value string `json:"value" yaml:"value"`
	// Origin is where the value came from.
	Origin Origin `json:"origin" yaml:"origin"`
	// From names the file, variable or flag when Origin is not default.
	From string `json:"from,omitempty" yaml:"from,omitempty"`
}

// LoadEffective is Load that also returns every key of the resulting
// configuration with its value and where it came from, sorted by key. It
// validates as Load does: `trapline config check` is LoadEffective (or Load)
// without starting anything.
func LoadEffective(path string, flags *pflag.FlagSet) (*Config, []Setting, error) {
	c, l, err := loadFile(path, flags)
	if err != nil {
		return nil, nil, err
	}
	var out []Setting
	walkLeaves(reflect.ValueOf(c).Elem(), "", func(key string, v reflect.Value) {
		if v.Kind() == reflect.Slice && v.Type().Elem().Kind() == reflect.Struct {
			for i := 0; i < v.Len(); i++ {
				item := fmt.Sprintf("%s[%d]", key, i)
				walkLeaves(v.Index(i), item, func(k string, iv reflect.Value) {
					out = append(out, setting(k, key, iv, l, path))
				})
			}
			return
		}
		out = append(out, setting(key, key, v, l, path))
	})
	sort.Slice(out, func(i, j int) bool { return out[i].Key < out[j].Key })
	return c, out, nil
}

// setting builds the Setting of key; layerKey is the key whose layer
// decides the origin (the list for an item of a list).
func setting(key, layerKey string, v reflect.Value, l layers, path string) Setting {
	s := Setting{Key: key, Value: formatValue(key, v), Origin: OriginDefault}
	switch env := EnvName(layerKey); {
	case l.fromFlag[layerKey] != "":
		s.Origin, s.From = OriginFlag, "--"+l.fromFlag[layerKey]
	case envSet(env):
		s.Origin, s.From = OriginEnv, env
	case inTree(l.file, layerKey):
		s.Origin, s.From = OriginFile, path
	}
	return s
}

func envSet(name string) bool { _, ok := os.LookupEnv(name); return ok }

// inTree reports whether a dotted key is present in a parsed file.
func inTree(tree map[string]any, key string) bool {
	var node any = tree
	for _, part := range strings.Split(key, ".") {
		m, ok := node.(map[string]any)
		if !ok {
			return false
		}
		if node, ok = m[strings.ToLower(part)]; !ok {
			return false
		}
	}
	return true
}

// hidden are the keys whose values are never printed.
var hidden = map[string]bool{"nats.password": true, "nats.token": true}

// formatValue writes a value as in a config file.
func formatValue(key string, v reflect.Value) string {
	if !v.IsValid() {
		return ""
	}
	x := v.Interface()
	if hidden[key] {
		if v.String() != "" {
			return "(set, hidden)"
		}
		return ""
	}
	switch x := x.(type) {
	case time.Duration:
		return fmtDuration(x)
	case Size:
		return x.String()
	case string:
		if key == "nats.url" {
			return redactURLs(x)
		}
		return x
	case float64:
		return strconv.FormatFloat(x, 'g', -1, 64)
	}
	if v.Kind() == reflect.Slice {
		parts := make([]string, v.Len())
		for i := range parts {
			parts[i] = fmt.Sprint(v.Index(i).Interface())
		}
		return strings.Join(parts, ",")
	}
	return fmt.Sprint(x)
}

// redactURLs hides the passwords in a comma-separated list of URLs.
func redactURLs(s string) string {
	parts := strings.Split(s, ",")
	for i, p := range parts {
		if u, err := url.Parse(strings.TrimSpace(p)); err == nil && u.User != nil {
			parts[i] = u.Redacted()
		}
	}
	return strings.Join(parts, ",")
}

// WriteSettings prints settings as a text table (format "text" or ""), as
// YAML or as JSON.
func WriteSettings(w io.Writer, settings []Setting, format string) error {
	switch format {
	case "", "text":
		tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		fmt.Fprintln(tw, "KEY\tVALUE\tORIGIN")
		for _, s := range settings {
			origin := string(s.Origin)
			if s.From != "" {
				origin += " (" + s.From + ")"
			}
			fmt.Fprintf(tw, "%s\t%s\t%s\n", s.Key, s.Value, origin)
		}
		return tw.Flush()
	case "json":
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(settings)
	case "yaml":
		enc := yaml.NewEncoder(w)
		enc.SetIndent(2)
		if err := enc.Encode(settings); err != nil {
			return err
		}
		return enc.Close()
	}
	return fmt.Errorf("format %q: want text, yaml or json", format)
}
