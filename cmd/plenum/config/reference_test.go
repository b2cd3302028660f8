package config

import (
	"os"
	"reflect"
	"sort"
	"strings"
	"testing"
)

// configKeys lists every key of the configuration types, from their yaml
// struct tags, as the reference writes them: sections joined by dots, a
// list's entries marked "[]".
func configKeys(t reflect.Type, prefix string, out *[]string) {
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		key, ok := yamlKey(f)
		if !ok {
			continue
		}
		if prefix != "" {
			key = prefix + "." + key
		}
		*out = append(*out, key)
		ft := f.Type
		for ft.Kind() == reflect.Pointer {
			ft = ft.Elem()
		}
		if ft.Kind() == reflect.Slice && ft.Elem().Kind() == reflect.Struct {
			configKeys(ft.Elem(), key+"[]", out)
		} else if ft.Kind() == reflect.Struct && ft != durationType {
			configKeys(ft, key, out)
		}
	}
}

// referenceRows returns the rows of REFERENCE.md's key tables by key.
func referenceRows(t *testing.T) map[string][]string {
	b, err := os.ReadFile("REFERENCE.md")
	if err != nil {
		t.Fatal(err)
	}
	rows := map[string][]string{}
	for _, line := range strings.Split(string(b), "\n") {
		if !strings.HasPrefix(line, "| `") {
			continue
		}
		cells := strings.Split(strings.Trim(line, "|"), " | ")
		for i := range cells {
			cells[i] = strings.TrimSpace(cells[i])
		}
		key := strings.Trim(cells[0], "`")
		if _, dup := rows[key]; dup {
			t.Errorf("REFERENCE.md describes %s twice", key)
		}
		rows[key] = cells
	}
	return rows
}

// TestReferenceNamesEveryKey fails when a key exists in the configuration
// types but not in REFERENCE.md, or is described there but no longer
// exists, or its row lacks a type, unit, default, allowed values or an
// example.
func TestReferenceNamesEveryKey(t *testing.T) {
	var keys []string
	configKeys(reflect.TypeOf(Config{}), "", &keys)
	if len(keys) < 100 {
		t.Fatalf("only %d keys found in the types: the walk is broken", len(keys))
	}
	rows := referenceRows(t)
	for _, k := range keys {
		cells, ok := rows[k]
		if !ok {
			t.Errorf("key %s is not in REFERENCE.md", k)
			continue
		}
		if len(cells) != 6 {
			t.Errorf("REFERENCE.md row of %s has %d cells, want 6 (key, type, unit, default, allowed, example)", k, len(cells))
			continue
		}
		for i, name := range []string{"key", "type", "unit", "default", "allowed values", "example"} {
			if cells[i] == "" {
				t.Errorf("REFERENCE.md row of %s has no %s", k, name)
			}
		}
		delete(rows, k)
	}
	var stale []string
	for k := range rows {
		stale = append(stale, k)
	}
	sort.Strings(stale)
	for _, k := range stale {
		t.Errorf("REFERENCE.md describes %s, which is no key of the configuration", k)
	}
}

// TestReferenceWalkSeesNewKeys checks the walk itself on a type of its
// own: a key added to a nested section or a list entry is listed.
func TestReferenceWalkSeesNewKeys(t *testing.T) {
	type inner struct {
		Depth float64 `yaml:"depth_m"`
		Skip  int     `yaml:"-"`
	}
	type outer struct {
		Name  string   `yaml:"name"`
		Wells []inner  `yaml:"wells"`
		Main  *inner   `yaml:"main"`
		Every Duration `yaml:"every"`
		hide  int
	}
	var got []string
	configKeys(reflect.TypeOf(outer{}), "", &got)
	want := []string{"name", "wells", "wells[].depth_m", "main", "main.depth_m", "every"}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("keys %v, want %v", got, want)
	}
}
