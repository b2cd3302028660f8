// Command plenum captures an engine's sensors live, derives what the raw
// signals mean and publishes the result over MQTT and Prometheus; it also
// checks configurations, probes CAN buses, replays and plots recorded runs
// and controls a running daemon. plenum -h lists the commands.
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
	"strings"
	"syscall"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/sdnotify"
)

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

// errHelp is returned by a command asked for its usage (-h, -help): the
// usage went to standard output and the exit status is 0.
var errHelp = errors.New("help requested")

// usage is the top-level usage, printed by plenum -h and plenum help.
const usage = `usage: plenum COMMAND [flags]

commands:
  demo        simulated engine and embedded broker, no hardware needed
  run         the daemon, on real hardware: run -config FILE
  check       check a configuration without opening anything: check -config FILE
  probe       list the ECUs that answer on a CAN bus, their VIN and supported PIDs
  replay      re-derive a recorded run
  plot        draw recorded runs
  sheet       draw the dyno sheet of recorded runs, to print or hand over
  runs        list recorded runs: runs -dir DIR
  show        one run's summary for a person: show RUN
  run-start   start a run in a running daemon
  run-stop    stop the run of a running daemon
  warning-ack acknowledge a raised warning in a running daemon
  version     print the version, commit, date, Go version and platform
  help        print this, or help COMMAND for a command's flags

plenum COMMAND -h lists a command's flags.
`

// commands are the names run accepts, for the unknown-command message.
const commands = "demo, run, run-start, run-stop, warning-ack, check, probe, replay, plot, sheet, runs, show, version or help"

func run(args []string, stdout, stderr io.Writer) int {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	// Debug passes here: the daemon filters by its log_level (info by default).
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelDebug}))
	return runCommand(ctx, args, stdout, stderr, log)
}

// runCommand runs the command args names, logging to log, and returns the
// exit status: 0 done (or usage asked for), 1 failed, 2 a bad command line
// or configuration.
func runCommand(ctx context.Context, args []string, stdout, stderr io.Writer, log *slog.Logger) int {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return 2
	}
	var err error
	switch args[0] {
	case "-h", "-help", "--help", "help":
		if args[0] == "help" && len(args) == 2 && args[1] != "help" {
			return runCommand(ctx, []string{args[1], "-h"}, stdout, stderr, log)
		}
		if args[0] == "help" && len(args) == 2 {
			args = args[:1] // help help
		}
		if len(args) > 1 {
			err = usageError{fmt.Sprintf("help takes at most one command, not %q", strings.Join(args[1:], " "))}
			break
		}
		fmt.Fprint(stdout, usage)
		return 0
	case "version":
		fs := newFlagSet("version", "", "print the version", stdout)
		if err = parseFlags(fs, args[1:]); err == nil {
			fmt.Fprintln(stdout, thisBuild())
		}
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
	case "sheet":
		err = cmdSheet(args[1:], stdout)
	case "runs":
		err = cmdRuns(args[1:], stdout)
	case "show":
		err = cmdShow(args[1:], stdout)
	case "run-start":
		err = cmdRunControl("start", args[1:], stdout)
	case "run-stop":
		err = cmdRunControl("stop", args[1:], stdout)
	case "warning-ack":
		err = cmdWarningAck(args[1:], stdout)
	default:
		err = usageError{fmt.Sprintf("unknown command %q: want %s (plenum help lists them)", args[0], commands)}
	}
	if err == nil || errors.Is(err, errHelp) {
		return 0
	}
	fmt.Fprintln(stderr, "plenum:", err)
	var ue usageError
	var ce config.Errors
	var ce1 *config.Error
	if errors.As(err, &ue) || errors.As(err, &ce) || errors.As(err, &ce1) {
		return 2
	}
	return 1
}

// cmdFlags is a command's flag set and where its usage goes when asked
// for.
type cmdFlags struct {
	*flag.FlagSet
	stdout   io.Writer
	synopsis string // the arguments after the command
	what     string // what the command does
}

// newFlagSet returns the flag set of command name; -h prints synopsis
// (the arguments after the command), what the command does, and the flags
// to stdout.
func newFlagSet(name, synopsis, what string, stdout io.Writer) *cmdFlags {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	fs.Usage = func() {} // a bad flag is reported by run, without the usage
	return &cmdFlags{FlagSet: fs, stdout: stdout, synopsis: synopsis, what: what}
}

// printUsage writes the command's usage and flags to its stdout.
func (fs *cmdFlags) printUsage() {
	fmt.Fprintf(fs.stdout, "usage: plenum %s %s\n\n%s\n", fs.Name(), fs.synopsis, fs.what)
	n := 0
	fs.VisitAll(func(*flag.Flag) { n++ })
	if n > 0 {
		fmt.Fprintln(fs.stdout, "\nflags:")
		fs.SetOutput(fs.stdout)
		fs.PrintDefaults()
		fs.SetOutput(io.Discard)
	}
}

// parseFlags parses args into fs. -h prints the usage and returns errHelp;
// a bad flag or an argument that is not a flag is a usageError.
func parseFlags(fs *cmdFlags, args []string) error {
	if err := fs.Parse(args); errors.Is(err, flag.ErrHelp) {
		fs.printUsage()
		return errHelp
	} else if err != nil {
		return usageError{fmt.Sprintf("%s: %v (plenum %s -h lists the flags)", fs.Name(), err, fs.Name())}
	}
	if n := 0; fs.NArg() > 0 {
		if fs.VisitAll(func(*flag.Flag) { n++ }); n == 0 {
			return usageError{fmt.Sprintf("%s: unexpected argument %q: %s takes none", fs.Name(), fs.Arg(0), fs.Name())}
		}
		return usageError{fmt.Sprintf("%s: unexpected argument %q: %s takes flags only (plenum %s -h lists them)", fs.Name(), fs.Arg(0), fs.Name(), fs.Name())}
	}
	return nil
}

// cmdCheck loads the configuration and builds, without opening anything,
// all that run builds from it: what check accepts, run starts.
func cmdCheck(args []string, stdout io.Writer, log *slog.Logger) error {
	fs := newFlagSet("check", "-config FILE", "Checks a configuration: builds all that run builds from it, opening nothing.\nExit status 2 when it is bad.", stdout)
	path := fs.String("config", "", "configuration file")
	if err := parseFlags(fs, args); err != nil {
		return err
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
		if strings.HasPrefix(f, "$CREDENTIALS_DIRECTORY/") || strings.HasPrefix(f, "${CREDENTIALS_DIRECTORY}/") {
			fmt.Fprintf(stdout, "note: %s is a systemd credential; run reads it at start-up under its unit (LoadCredential=).\n", f)
			continue
		}
		fmt.Fprintf(stdout, "note: %s does not exist on this machine; run reads it at start-up.\n", f)
	}
	fmt.Fprintf(stdout, "%s: ok (vehicle %s, %d serial source(s), %d channels)\n", *path, cfg.Vehicle, len(cfg.Serial), len(rep.Channels))
	return nil
}

// maxTimeScale is the fastest the demo's simulated engine runs, as
// simulator.time_scale allows: faster, the simulated microcontroller's
// frames no longer keep up with the engine model.
const maxTimeScale = 100.0

func cmdDemo(ctx context.Context, args []string, stdout io.Writer, log *slog.Logger) error {
	fs := newFlagSet("demo", "[flags]", "Runs the daemon on a simulated engine with an embedded MQTT broker: no hardware needed.", stdout)
	httpAddr := fs.String("http", "127.0.0.1:9108", "metrics listen address")
	mqttAddr := fs.String("mqtt", "127.0.0.1:1883", "embedded MQTT broker listen address")
	dur := fs.Duration("for", 0, "stop by itself after this long (0: run until interrupted)")
	scale := fs.Float64("time-scale", 1, fmt.Sprintf("simulated seconds per real second, more than 0 and at most %g", maxTimeScale))
	recordDir := fs.String("record", "", "record every sample and event in line protocol under this directory")
	label := fs.String("label", "", "label of the recorded run, e.g. \"baseline\" (with -record)")
	stateDir := fs.String("state-dir", "", "keep the turbo state and the MQTT outbox in this directory across demos (default: a fresh temporary directory, removed at exit)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if !(*scale > 0 && *scale <= maxTimeScale) {
		return usageError{fmt.Sprintf("demo: -time-scale %g is out of range: simulated seconds per real second, more than 0 and at most %g", *scale, maxTimeScale)}
	}
	if *dur < 0 {
		return usageError{fmt.Sprintf("demo: -for %v is negative: give how long to run, or 0 to run until interrupted", *dur)}
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
	cfg.Record.Dir, cfg.Record.StartLabel = *recordDir, *label
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
	if *dur > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, *dur)
		defer cancel()
	}
	err = runDaemon(ctx, cfg, stdout, log)
	if le := (*config.ListenError)(nil); errors.As(err, &le) {
		le.Flag = map[string]string{"http.listen": "-http", "mqtt.listen": "-mqtt"}[le.Key]
	}
	return err
}

func cmdRun(ctx context.Context, args []string, stdout io.Writer, log *slog.Logger) error {
	fs := newFlagSet("run", "-config FILE", "Runs the daemon on real hardware with the configuration in FILE.\nSIGHUP reloads FILE (log_level applies live; other changes are refused, named).", stdout)
	path := fs.String("config", "", "configuration file")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *path == "" {
		return usageError{"run needs -config FILE"}
	}
	// SIGHUP reloads the configuration (ExecReload= in the unit); taken
	// before anything else, so that an early one does not end the process.
	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	cfg, err := config.Load(*path)
	if err != nil {
		return err
	}
	creds := os.Getenv("CREDENTIALS_DIRECTORY")
	if err := cfg.ExpandCredentials(creds); err != nil {
		return err
	}
	return runDaemonWith(ctx, cfg, stdout, log, service{notify: sdnotify.FromEnv(os.Getenv, os.Getpid()),
		reload: hup, configPath: *path, credentials: creds})
}

// shutdownGrace bounds how long the daemon waits for its parts to stop.
const shutdownGrace = 5 * time.Second
