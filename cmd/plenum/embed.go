package main

import _ "embed"

// demoConfig is the configuration `plenum demo` runs on.
//
//go:embed demo.yaml
var demoConfig []byte
