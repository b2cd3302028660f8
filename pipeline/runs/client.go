package runs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strings"
	"time"
)

// Client asks a running daemon's HTTP API, the other end of Handler: run
// start and stop, warning acknowledgement. The zero value is not usable:
// Base and Token are needed.
type Client struct {
	Base  string       // the daemon's base URL, as DaemonURL gives it
	Token string       // the control token, sent as Authorization: Bearer
	HTTP  *http.Client // nil: one with a 10 s timeout
}

// ErrUnauthorized is returned (wrapped) when the daemon refuses the token.
var ErrUnauthorized = errors.New("the daemon refused the control token")

// Post sends form (empty values left out) to path and returns the daemon's
// reply; a reply that is not OK is an error carrying the daemon's words.
func (c Client) Post(ctx context.Context, path string, form url.Values) (Reply, error) {
	for k, v := range form {
		if len(v) == 1 && v[0] == "" {
			delete(form, k)
		}
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, c.Base+path, strings.NewReader(form.Encode()))
	if err != nil {
		return Reply{}, err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Authorization", "Bearer "+c.Token)
	hc := c.HTTP
	if hc == nil {
		hc = &http.Client{Timeout: 10 * time.Second}
	}
	resp, err := hc.Do(req)
	if err != nil {
		return Reply{}, err
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
	var rep Reply
	if resp.StatusCode == http.StatusUnauthorized {
		return rep, fmt.Errorf("%w (%s)", ErrUnauthorized, resp.Status)
	}
	if err := json.Unmarshal(body, &rep); err != nil {
		return Reply{}, fmt.Errorf("%s: %s", resp.Status, strings.TrimSpace(string(body)))
	}
	if resp.StatusCode != http.StatusOK || !rep.OK {
		return rep, fmt.Errorf("%s: %s", resp.Status, rep.Error)
	}
	return rep, nil
}

// DaemonURL turns an address as a person gives it (host:port, or an
// http:// or https:// URL with no path beyond "/") into the daemon's base
// URL.
func DaemonURL(addr string) (string, error) {
	if !strings.Contains(addr, "://") {
		addr = "http://" + addr
	}
	u, err := url.Parse(addr)
	switch {
	case err != nil:
		return "", fmt.Errorf("%q: want host:port or http://host:port: %w", addr, err)
	case u.Scheme != "http" && u.Scheme != "https":
		return "", fmt.Errorf("%q: the daemon speaks http, not %s: want host:port or http://host:port", addr, u.Scheme)
	case u.Host == "":
		return "", fmt.Errorf("%q has no host: want host:port or http://host:port", addr)
	case u.Path != "" && u.Path != "/" || u.RawQuery != "" || u.Fragment != "" || u.User != nil:
		return "", fmt.Errorf("%q: give only the daemon's address (host:port or http://host:port), not a path or query", addr)
	}
	return u.Scheme + "://" + u.Host, nil
}
