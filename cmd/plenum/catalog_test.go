package main

import (
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
	for _, path := range []string{"../../deploy/plenum.yaml", "../../deploy/delimited.yaml", "../../deploy/firmware/plenum-mcu.yaml", "../../testdata/golden-run/config.yaml"} {
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
			// check builds every part as run does, with a virtual bus in
			// place of SocketCAN: the daemon refuses to build with a channel
			// the catalogue lacks.
			rep, err := checkConfig(cfg)
			if err != nil {
				t.Fatal(err)
			}
			reg := pipeline.NewRegistry()
			for _, ch := range rep.Channels {
				reg.Register(ch)
			}
			if bad := pipeline.CheckCatalogued(reg); len(bad) > 0 {
				t.Errorf("not catalogued (or another unit): %v", bad)
			}
			if len(rep.Channels) < 5 {
				t.Errorf("only %d channels registered: the configuration was not built", len(rep.Channels))
			}
		})
	}
}
