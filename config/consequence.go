package config

import (
	"errors"
	"regexp"
	"strings"
)

// didYouMean finds the suggestion of an unknown-key message.
var didYouMean = regexp.MustCompile(`did you mean "([^"]+)"`)

// dropConsequences removes the validation problems that are only echoes of
// an earlier problem, so that one mistake gives one message:
//
//   - a misspelt key with a suggestion (sourcee, did you mean "source") left
//     the suggested key unset: its own problem ("empty source") goes;
//   - a value that did not decode (n: four) left its key at zero: a
//     problem of a key beside it that names it (clear_n "must be between 1
//     and n") goes.
func dropConsequences(validation, earlier []error) []error {
	exact := map[string]bool{}  // keys whose problems go
	naming := map[string]bool{} // parent + " " + leaf: sibling problems that name leaf go
	for _, e := range earlier {
		var fe *FieldError
		if !errors.As(e, &fe) || fe.Key == "" {
			continue
		}
		parent, leaf := splitKey(fe.Key)
		if m := didYouMean.FindStringSubmatch(fe.Msg); m != nil {
			exact[joinKey(parent, m[1])] = true
			continue
		}
		if parent != "" {
			naming[parent+" "+leaf] = true
		}
	}
	var out []error
	for _, e := range validation {
		var fe *FieldError
		if errors.As(e, &fe) && echoes(fe, exact, naming) {
			continue
		}
		out = append(out, e)
	}
	return out
}

// echoes reports whether a validation problem follows from an earlier one.
func echoes(fe *FieldError, exact, naming map[string]bool) bool {
	if exact[fe.Key] {
		return true
	}
	parent, _ := splitKey(fe.Key)
	for _, word := range strings.FieldsFunc(fe.Msg, func(r rune) bool {
		return !(r == '_' || r >= 'a' && r <= 'z' || r >= '0' && r <= '9')
	}) {
		if naming[parent+" "+word] {
			return true
		}
	}
	return false
}

// splitKey splits a dotted key into its parent and its last part.
func splitKey(key string) (parent, leaf string) {
	i := strings.LastIndex(key, ".")
	if i < 0 {
		return "", key
	}
	return key[:i], key[i+1:]
}
