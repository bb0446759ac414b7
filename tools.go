//go:build tools

package main

import (
	_ "github.com/creack/pty"
	_ "github.com/mattn/go-isatty"
	_ "github.com/nats-io/nats-server/v2/server"
	_ "github.com/nats-io/nats.go"
	_ "github.com/nats-io/nats.go/jetstream"
	_ "github.com/prometheus/client_golang/prometheus"
	_ "github.com/prometheus/client_golang/prometheus/promhttp"
	_ "github.com/rs/zerolog"
	_ "github.com/schollz/progressbar/v3"
	_ "github.com/spf13/cobra"
	_ "github.com/spf13/viper"
	_ "go.bug.st/serial"
	_ "go.yaml.in/yaml/v3"
	_ "golang.org/x/sync/errgroup"
	_ "golang.org/x/term"
	_ "gonum.org/v1/gonum/mat"
	_ "gonum.org/v1/gonum/stat"
	_ "gonum.org/v1/plot"
)
