// Package config loads the configuration of the trapline daemon: defaults
// from one place (Default), then a YAML, TOML or JSON file, then TRAPLINE_*
// environment variables, then command-line flags. Decoding is strict (an
// unknown key anywhere is an error naming its full path) and validation
// reports every problem at once, each prefixed with its key path, in a single
// *Errors value that the command line turns into exit code 2.
//
// config only reads and checks settings. It starts nothing and opens no
// connection; it may import ingest, analyze and alerts (whose sections it
// embeds) and must not import daemon.
package config
