//go:build !race

package tests

// raceBuild reports whether the tests run under the race detector (see
// race_on_test.go).
const raceBuild = false
