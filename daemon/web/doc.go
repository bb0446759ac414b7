// Package web is the live view: a page in the browser, served by the
// daemon's own HTTP server beside /metrics, that lists every stream with its
// state and current alarms and shows one stream in detail (the last 20 s of
// pressure and flow, an hour of breath trends, the alarm timeline with each
// event's evidence, and acknowledge buttons).
//
// The daemon feeds a Hub from its analysis goroutines (Samples, Breath,
// Alert, Status). None of these waits for a page: each copies into a ring
// of fixed size under its stream's own lock. Hub.Run, one goroutine owned
// by the daemon, sends a frame ten times a second to every connected page
// over Server-Sent Events; a page that falls behind is disconnected rather
// than allowed to hold anything up, and its browser reconnects. The
// handler (NewHandler, mounted with Mount at Path) serves the page, its
// script and the vendored chart library (uPlot, MIT) from files embedded
// in the binary: nothing is fetched at run time.
//
// Acknowledgements go through an Acker, which the daemon implements with
// the same service that answers acknowledgement requests over NATS.
//
// See docs/live-view.md for the message format and the memory budget.
package web
