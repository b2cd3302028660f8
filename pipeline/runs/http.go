package runs

import (
	"crypto/subtle"
	"encoding/json"
	"net/http"
)

// Handler serves GET /api/runs/current ({"run": id}) and, when
// Config.ControlToken is set, POST /api/runs/start (form fields label,
// notes, pressure_kpa, temperature_c, humidity_percent; answers {"run":
// id}) and POST /api/runs/stop (answers the run summary). Commands must
// carry "Authorization: Bearer <token>".
func (c *Controller) Handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /api/runs/current", func(w http.ResponseWriter, _ *http.Request) {
		json.NewEncoder(w).Encode(map[string]string{"run": c.Current()})
	})
	authed := func(h http.HandlerFunc) http.HandlerFunc {
		return func(w http.ResponseWriter, req *http.Request) {
			tok := c.cfg.ControlToken
			if tok == "" {
				http.Error(w, "run commands are off: set record.control_token_file in the daemon's configuration to enable them", http.StatusForbidden)
				return
			}
			if subtle.ConstantTimeCompare([]byte(req.Header.Get("Authorization")), []byte("Bearer "+tok)) != 1 {
				http.Error(w, "unauthorized: send the token of record.control_token_file as Authorization: Bearer TOKEN (plenum run-start reads it from $PLENUM_CONTROL_TOKEN or -token-file)", http.StatusUnauthorized)
				return
			}
			h(w, req)
		}
	}
	mux.HandleFunc("POST /api/runs/start", authed(func(w http.ResponseWriter, req *http.Request) {
		sr := StartRequest{Label: req.FormValue("label"), Notes: req.FormValue("notes")}
		if err := parseEntered(req, &sr.Entered); err != nil {
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		sr.By = "http"
		id, err := c.Start(sr)
		if err != nil {
			http.Error(w, err.Error(), http.StatusConflict)
			return
		}
		json.NewEncoder(w).Encode(map[string]string{"run": id})
	}))
	mux.HandleFunc("POST /api/runs/stop", authed(func(w http.ResponseWriter, _ *http.Request) {
		sum, err := c.stop("http")
		if err != nil && sum.Run == "" {
			http.Error(w, err.Error(), http.StatusConflict)
			return
		}
		w.Write(sum.JSON())
	}))
	return mux
}
