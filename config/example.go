package config

import _ "embed"

//go:embed trapline.example.yaml
var example []byte

// Example returns the commented example configuration: every key with its
// default value and one example stream. A test loads it and compares it with
// Default, so the two cannot drift apart.
func Example() []byte {
	return append([]byte(nil), example...)
}
