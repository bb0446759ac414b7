// Command trapline watches ventilator pressure and flow breath by breath,
// estimates respiratory mechanics and air trapping, and raises alerts on NATS.
//
// Research use only; not a medical device.
package main

import (
	"os"

	"trapline/daemon/cli"
)

func main() {
	os.Exit(cli.Main(os.Args[1:]))
}
