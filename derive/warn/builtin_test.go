package warn

import (
	"reflect"
	"testing"
)

func TestBuiltinRulesParse(t *testing.T) {
	seen := map[string]bool{}
	for _, b := range Builtin() {
		if seen[b.Name] {
			t.Errorf("built-in rule %q twice", b.Name)
		}
		seen[b.Name] = true
		r, err := Parse(b.Name, b.Rule)
		if err != nil {
			t.Errorf("built-in rule %q: %v", b.Name, err)
			continue
		}
		if len(r.Channels()) == 0 {
			t.Errorf("built-in rule %q reads no channel", b.Name)
		}
	}
	if len(seen) != 8 {
		t.Errorf("%d built-in rules, want 8", len(seen))
	}
}

func TestBuiltinChannels(t *testing.T) {
	want := map[string][]string{
		"lean_under_boost":      {"lambda", "boost_pressure"},
		"over_boost":            {"boost_pressure"},
		"hot_intake_air":        {"intake_air_temp"},
		"hot_oil":               {"oil_temp"},
		"hot_coolant":           {"coolant_temp"},
		"low_oil_pressure":      {"oil_pressure", "engine_speed"},
		"cold_engine_high_load": {"turbo_warmup_warning"},
		"switched_off_hot":      {"turbo_shutdown_hot"},
	}
	for _, b := range Builtin() {
		r, err := Parse(b.Name, b.Rule)
		if err != nil {
			t.Fatal(err)
		}
		if got := r.Channels(); !reflect.DeepEqual(got, want[b.Name]) {
			t.Errorf("%s: channels %v, want %v", b.Name, got, want[b.Name])
		}
	}
}

func TestRuleChannels(t *testing.T) {
	cases := []struct {
		src  string
		want []string
	}{
		{"a > 1", []string{"a"}},
		{"a > 1 and b < 2", []string{"a", "b"}},
		{"a > 1 and (b > 2 or c > 3)", []string{"a", "b", "c"}},
		{"(a > 1 or b > 2) and a < 5", []string{"a", "b", "a"}},
		{"rate(map) < -50000 or lambda outside 0.7..1.3", []string{"map", "lambda"}},
	}
	for _, c := range cases {
		r, err := Parse("r", c.src)
		if err != nil {
			t.Fatalf("%q: %v", c.src, err)
		}
		if got := r.Channels(); !reflect.DeepEqual(got, c.want) {
			t.Errorf("%q: channels %v, want %v", c.src, got, c.want)
		}
	}
}

func TestMerge(t *testing.T) {
	base := []Text{{"a", "x > 1"}, {"b", "y > 1"}, {"c", "z > 1"}}
	cases := []struct {
		name string
		over []Text
		want []Text
	}{
		{"none", nil, base},
		{"replace in place", []Text{{"b", "y > 2"}}, []Text{{"a", "x > 1"}, {"b", "y > 2"}, {"c", "z > 1"}}},
		{"off kept in place", []Text{{"a", Off}}, []Text{{"a", Off}, {"b", "y > 1"}, {"c", "z > 1"}}},
		{"appended in order", []Text{{"e", "v > 1"}, {"d", "w > 1"}}, []Text{{"a", "x > 1"}, {"b", "y > 1"}, {"c", "z > 1"}, {"e", "v > 1"}, {"d", "w > 1"}}},
		{"mixed", []Text{{"d", "w > 1"}, {"c", "z > 3"}}, []Text{{"a", "x > 1"}, {"b", "y > 1"}, {"c", "z > 3"}, {"d", "w > 1"}}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			before := append([]Text(nil), base...)
			got := Merge(base, c.over)
			if !reflect.DeepEqual(got, c.want) {
				t.Errorf("got %v, want %v", got, c.want)
			}
			if !reflect.DeepEqual(base, before) {
				t.Errorf("Merge modified base: %v", base)
			}
		})
	}
}
