package main

import (
	"log/slog"
	"os"
	"testing"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
)

// Every channel a configuration makes the daemon write (inputs, OBD
// channels, derived outputs, one warning per rule) has its entry in the
// channel catalogue, with the catalogue's unit. The daemon refuses to start
// otherwise; this test finds a missing entry before a user does.
func TestEveryWrittenChannelIsCatalogued(t *testing.T) {
	configs := map[string][]byte{"demo.yaml": demoConfig}
	for _, path := range []string{"../../deploy/plenum.yaml", "../../deploy/delimited.yaml", "../../testdata/golden-run/config.yaml"} {
		b, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		configs[path] = b
	}
	for name, b := range configs {
		t.Run(name, func(t *testing.T) {
			cfg, err := config.Parse(name, b)
			if err != nil {
				t.Fatal(err)
			}
			cfg.CAN = nil // a real SocketCAN bus is not needed to know its channels
			if name == "demo.yaml" {
				c2, _ := config.Parse(name, b)
				cfg.CAN = c2.CAN // the simulated bus is
			}
			reg := pipeline.NewRegistry()
			_, cleanup, err := buildSources(cfg, reg, slog.New(slog.DiscardHandler))
			if err != nil {
				t.Fatal(err)
			}
			defer cleanup()
			ds, _, err := buildAll(cfg, reg)
			if err != nil {
				t.Fatal(err)
			}
			if _, err := pipeline.BuildGraph(reg, ds); err != nil {
				t.Fatal(err)
			}
			if bad := pipeline.CheckCatalogued(reg); len(bad) > 0 {
				t.Errorf("not catalogued (or another unit): %v", bad)
			}
			if reg.Len() < 5 {
				t.Errorf("only %d channels registered: the configuration was not built", reg.Len())
			}
		})
	}
}
