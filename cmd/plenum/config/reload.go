package config

import (
	"fmt"
	"log/slog"
	"reflect"
	"strings"
)

// ParseLogLevel returns the level log_level names: debug, info (also
// empty), warn or error.
func ParseLogLevel(s string) (slog.Level, error) {
	switch s {
	case "debug":
		return slog.LevelDebug, nil
	case "", "info":
		return slog.LevelInfo, nil
	case "warn":
		return slog.LevelWarn, nil
	case "error":
		return slog.LevelError, nil
	}
	return 0, fmt.Errorf("%q is not a log level: want debug, info, warn or error", s)
}

// liveKeys are the keys a running daemon applies on a reload; every other
// change needs a restart.
var liveKeys = map[string]bool{"log_level": true}

// Reload is what a new configuration file would change in a daemon
// running on the old one.
type Reload struct {
	// Live lists the changed keys the daemon applies at once (log_level).
	Live []string
	// Restart lists the changed keys that need a restart, e.g.
	// "serial[0].device". When it is not empty the reload is refused as a
	// whole and the daemon keeps running on the old configuration.
	Restart []string
}

// Refused says why the reload is refused, naming every key that needs a
// restart ("serial[0].device changed: restart needed"); "" when it is not.
func (r Reload) Refused() string {
	if len(r.Restart) == 0 {
		return ""
	}
	parts := make([]string, len(r.Restart))
	for i, k := range r.Restart {
		parts[i] = k + " changed: restart needed"
	}
	return strings.Join(parts, "; ")
}

// PlanReload compares the configuration a daemon runs on with a new one
// (both already checked) and sorts the changed keys into those applied
// live and those that need a restart. Secret files are read at start-up:
// a changed secret under an unchanged path is not seen.
func PlanReload(old, new *Config) Reload {
	var r Reload
	for _, k := range Changed(old, new) {
		if liveKeys[k] {
			r.Live = append(r.Live, k)
		} else {
			r.Restart = append(r.Restart, k)
		}
	}
	return r
}

// Changed lists the configuration keys whose values differ between a and
// b, as written in the file ("serial[0].device", "mqtt.users[1].name"); a
// list whose length changed is named as a whole ("warnings").
func Changed(a, b *Config) []string {
	var out []string
	diff(reflect.ValueOf(*a), reflect.ValueOf(*b), "", &out)
	return out
}

func diff(a, b reflect.Value, path string, out *[]string) {
	switch a.Kind() {
	case reflect.Struct:
		t := a.Type()
		for i := 0; i < t.NumField(); i++ {
			f := t.Field(i)
			key, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
			if !f.IsExported() || key == "" || key == "-" {
				continue // not read from the file
			}
			if path != "" {
				key = path + "." + key
			}
			diff(a.Field(i), b.Field(i), key, out)
		}
	case reflect.Pointer:
		switch {
		case a.IsNil() && b.IsNil():
		case a.IsNil() || b.IsNil():
			*out = append(*out, path)
		default:
			diff(a.Elem(), b.Elem(), path, out)
		}
	case reflect.Slice, reflect.Array:
		if a.Len() != b.Len() {
			*out = append(*out, path)
			return
		}
		for i := 0; i < a.Len(); i++ {
			diff(a.Index(i), b.Index(i), fmt.Sprintf("%s[%d]", path, i), out)
		}
	default:
		if !reflect.DeepEqual(a.Interface(), b.Interface()) {
			*out = append(*out, path)
		}
	}
}
