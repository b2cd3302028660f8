// Command plenum captures an engine's sensors live, derives what the raw
// signals mean and publishes the result over MQTT and Prometheus.
//
// Usage:
//
//	plenum demo  [-http ADDR] [-mqtt ADDR] [-for DURATION]   simulated engine, embedded broker
//	plenum run   -config FILE                                 the daemon, on real hardware
//	plenum check -config FILE                                 check a configuration (exit 2 if bad)
//	plenum probe [-bus can0 | -sim] [-29bit]                  list responding ECUs, VIN, supported PIDs
//	plenum replay -in RUN [-config FILE] [-out FILE] [-csv]    re-derive a recorded run
//	plenum plot -in RUN[,RUN…] -out FILE.png|FILE.svg [-channels a,b]  draw runs
//	plenum run-start|run-stop [-addr A] [-label L]           start/stop a run in a running daemon
//	plenum version
//
// Plenum is advisory only: it is not a safety system.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
)

// version is set at build time with -ldflags "-X main.version=...".
var version = "0.1.0-dev"

// Safety is printed at start-up and in the README.
const Safety = `Plenum is advisory only and is not a safety system. Never watch a screen while
driving on a public road. Follow your dyno cell's and track's safety rules. Plenum only
reads from the ECU and never alters emissions equipment; defer to local law and licensed practice.`

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

// usageError is a bad command line: exit status 2.
type usageError struct{ msg string }

func (e usageError) Error() string { return e.msg }

func run(args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprintln(stderr, "usage: plenum demo|run|run-start|run-stop|check|probe|replay|plot|version [flags]")
		return 2
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelInfo}))
	var err error
	switch args[0] {
	case "version":
		fmt.Fprintln(stdout, "plenum", version)
		return 0
	case "check":
		err = cmdCheck(args[1:], stdout, log)
	case "demo":
		err = cmdDemo(ctx, args[1:], stdout, log)
	case "run":
		err = cmdRun(ctx, args[1:], stdout, log)
	case "probe":
		err = cmdProbe(ctx, args[1:], stdout)
	case "replay":
		err = cmdReplay(args[1:], stdout)
	case "plot":
		err = cmdPlot(args[1:], stdout)
	case "run-start":
		err = cmdRunControl("start", args[1:], stdout)
	case "run-stop":
		err = cmdRunControl("stop", args[1:], stdout)
	case "warning-ack":
		err = cmdWarningAck(args[1:], stdout)
	default:
		err = usageError{fmt.Sprintf("unknown command %q: want demo, run, run-start, run-stop, check, probe, replay, plot or version", args[0])}
	}
	if err == nil {
		return 0
	}
	fmt.Fprintln(stderr, "plenum:", err)
	var ue usageError
	var ce config.Errors
	var ce1 *config.Error
	if errors.As(err, &ue) || errors.As(err, &ce) || errors.As(err, &ce1) || errors.Is(err, flag.ErrHelp) {
		return 2
	}
	return 1
}

// cmdCheck loads the configuration and builds, without opening anything,
// all that run builds from it: what check accepts, run starts.
func cmdCheck(args []string, stdout io.Writer, log *slog.Logger) error {
	fs := flag.NewFlagSet("check", flag.ContinueOnError)
	path := fs.String("config", "", "configuration file")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	if *path == "" {
		return usageError{"check needs -config FILE"}
	}
	cfg, err := config.Load(*path)
	if err != nil {
		return err
	}
	rep, err := checkConfig(cfg)
	if err != nil {
		return err
	}
	logLeftOut(log, rep.LeftOut)
	for _, f := range rep.Absent {
		fmt.Fprintf(stdout, "note: %s does not exist on this machine; run reads it at start-up.\n", f)
	}
	fmt.Fprintf(stdout, "%s: ok (vehicle %s, %d serial source(s))\n", *path, cfg.Vehicle, len(cfg.Serial))
	return nil
}

func cmdDemo(ctx context.Context, args []string, stdout io.Writer, log *slog.Logger) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	httpAddr := fs.String("http", "127.0.0.1:9108", "metrics listen address")
	mqttAddr := fs.String("mqtt", "127.0.0.1:1883", "embedded MQTT broker listen address")
	dur := fs.Duration("for", 0, "stop by itself after this long (0: run until interrupted)")
	scale := fs.Float64("time-scale", 1, "simulated seconds per real second")
	recordDir := fs.String("record", "", "record every sample and event in line protocol under this directory")
	stateDir := fs.String("state-dir", "", "keep the turbo state and the MQTT outbox in this directory across demos (default: a fresh temporary directory, removed at exit)")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	cfg, err := config.Parse("demo.yaml (embedded)", demoConfig)
	if err != nil {
		return fmt.Errorf("embedded demo config: %w", err)
	}
	cfg.HTTP.Listen = *httpAddr
	cfg.MQTT.Listen = *mqttAddr
	if cfg.Sim == nil {
		cfg.Sim = &config.Simulator{}
	}
	cfg.Sim.TimeScale = *scale
	cfg.Record.Dir = *recordDir
	// The demo starts cold: its own turbo state and outbox, never those of
	// earlier demos or of `run` in the user's cache directory.
	cfg.StateDir = *stateDir
	if cfg.StateDir == "" {
		dir, err := os.MkdirTemp("", "plenum-demo-")
		if err != nil {
			return fmt.Errorf("demo state directory: %w", err)
		}
		defer os.RemoveAll(dir)
		cfg.StateDir = dir
	}
	fmt.Fprintf(stdout, "state:    %s\n", cfg.StateDir)
	if *dur > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, *dur)
		defer cancel()
	}
	return runDaemon(ctx, cfg, stdout, log)
}

func cmdRun(ctx context.Context, args []string, stdout io.Writer, log *slog.Logger) error {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	path := fs.String("config", "", "configuration file")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	if *path == "" {
		return usageError{"run needs -config FILE"}
	}
	cfg, err := config.Load(*path)
	if err != nil {
		return err
	}
	return runDaemon(ctx, cfg, stdout, log)
}

// shutdownGrace bounds how long the daemon waits for its parts to stop.
const shutdownGrace = 5 * time.Second
