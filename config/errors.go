package config

import (
	"fmt"
	"strings"
)

// FieldError is one problem with one key, named by its full path in the
// config file, e.g. "streams[2].source" or "nats.embedded.port".
type FieldError struct {
	// Key is the full key path; empty for a problem with the file as a whole.
	Key string
	// Msg says what is wrong and, for ranges and choices, what is allowed.
	Msg string
}

// Error formats the problem as "key: message".
func (e *FieldError) Error() string {
	if e.Key == "" {
		return e.Msg
	}
	return e.Key + ": " + e.Msg
}

// Errors is every problem found while loading and validating a
// configuration. The command line exits with code 2 for it.
type Errors struct {
	// File is the config file, empty when there was none.
	File string
	// Problems are in the order they were found: the file, unknown keys,
	// values of the wrong type, then validation.
	Problems []error
}

// Error lists the problems one per line under a heading.
func (e *Errors) Error() string {
	var b strings.Builder
	b.WriteString("invalid configuration")
	if e.File != "" {
		fmt.Fprintf(&b, " in %s", e.File)
	}
	if len(e.Problems) == 1 {
		b.WriteString(": ")
		b.WriteString(e.Problems[0].Error())
		return b.String()
	}
	fmt.Fprintf(&b, " (%d problems):", len(e.Problems))
	for _, p := range e.Problems {
		b.WriteString("\n  ")
		b.WriteString(p.Error())
	}
	return b.String()
}

// Unwrap returns the problems, so that errors.As finds a *FieldError.
func (e *Errors) Unwrap() []error { return e.Problems }

// problems collects errors and builds an *Errors, or nil when there are none.
type problems struct {
	list []error
}

// addf records a problem with key.
func (p *problems) addf(key, format string, args ...any) {
	p.list = append(p.list, &FieldError{Key: key, Msg: fmt.Sprintf(format, args...)})
}

// add records errors that already carry their key as "key: message" (from
// other packages' Validate methods), as FieldErrors.
func (p *problems) add(errs ...error) {
	for _, e := range errs {
		if e == nil {
			continue
		}
		if k, msg, ok := strings.Cut(e.Error(), ": "); ok && !strings.ContainsAny(k, " \t") {
			p.list = append(p.list, &FieldError{Key: k, Msg: msg})
			continue
		}
		p.list = append(p.list, e)
	}
}

// err returns the collected problems as *Errors, or nil.
func (p *problems) err(file string) error {
	if len(p.list) == 0 {
		return nil
	}
	return &Errors{File: file, Problems: p.list}
}
