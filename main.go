// Command trapline watches ventilator pressure and flow breath by breath,
// estimates respiratory mechanics and air trapping, and raises alerts on NATS.
//
// Research use only; not a medical device.
package main

import (
	"os"

	"trapline/daemon"
)

func main() {
	os.Exit(daemon.Main(os.Args[1:]))
}
