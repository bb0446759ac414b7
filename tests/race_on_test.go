//go:build race

package tests

// raceBuild reports whether the tests run under the race detector: the
// daemon they start is then this test binary, instrumented, whose memory is
// several times a normal build's, so memory budgets are not checked.
const raceBuild = true
