package record

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
)

// Correction says how a run's power was corrected: the standard, and the
// ambient conditions entered for the run, which the correction used in
// place of the ambient channels for the whole run.
type Correction struct {
	Standard string `json:"standard"` // e.g. "sae_j1349"
	// Entered are the conditions entered with the start command and used
	// by the correction; nil when none were entered.
	Entered *Conditions `json:"entered,omitempty"`
	// Others says where the values not entered came from.
	Others string `json:"others,omitempty"`
}

// SetConditions replaces the conditions in the run's run.json, for
// conditions known only after the start (the ambient sensors' first fresh
// readings) or the reason there are none. The file is replaced durably:
// a power cut leaves the old run.json or the new, whole.
func (r *Recorder) SetConditions(c Conditions) error {
	path := filepath.Join(r.dir, "run.json")
	b, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("record: %w", err)
	}
	var m Meta
	if err := json.Unmarshal(b, &m); err != nil {
		return fmt.Errorf("record: %s: %w", path, err)
	}
	m.Conditions = &c
	if c.Empty() && c.Note == "" {
		m.Conditions = nil
	}
	meta, _ := json.MarshalIndent(m, "", "  ")
	return writeSynced(path, meta)
}
