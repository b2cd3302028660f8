package config

import (
	"fmt"
	"path/filepath"
	"strings"
)

// Credential prefixes: a file key whose value starts with one of these
// names a systemd credential, a file in the directory the service manager
// passes in $CREDENTIALS_DIRECTORY (LoadCredential= in the unit), readable
// by the service alone.
var credentialPrefixes = []string{"$CREDENTIALS_DIRECTORY/", "${CREDENTIALS_DIRECTORY}/"}

// fileKey is one key of the configuration that names a file, with a
// pointer to its value.
type fileKey struct {
	p    *string
	path []any // the key, as for Config.At
}

// key is the key as written, e.g. "mqtt.users[1].password_file".
func (f fileKey) key() string { return fieldName(f.path) }

// files lists the keys of c that name secrets and certificates, pointing
// into c (its user lists included: copy them first when c is a copy).
func (c *Config) files() []fileKey {
	m := &c.MQTT
	fk := []fileKey{
		{&c.Record.ControlTokenFile, []any{"record", "control_token_file"}},
		{&c.Record.Push.TokenFile, []any{"record", "push", "token_file"}},
		{&c.Record.Push.PasswordFile, []any{"record", "push", "password_file"}},
		{&m.PasswordFile, []any{"mqtt", "password_file"}},
		{&m.CAFile, []any{"mqtt", "ca_file"}},
		{&m.CertFile, []any{"mqtt", "cert_file"}},
		{&m.KeyFile, []any{"mqtt", "key_file"}},
	}
	for i := range m.Users {
		fk = append(fk, fileKey{&m.Users[i].PasswordFile, []any{"mqtt", "users", i, "password_file"}})
	}
	for i := range c.HTTP.Users {
		fk = append(fk, fileKey{&c.HTTP.Users[i].PasswordFile, []any{"http", "users", i, "password_file"}})
	}
	return append(fk,
		fileKey{&c.HTTP.TLSCertFile, []any{"http", "tls_cert_file"}},
		fileKey{&c.HTTP.TLSKeyFile, []any{"http", "tls_key_file"}},
		fileKey{&c.Follow.PasswordFile, []any{"follow", "password_file"}},
		fileKey{&c.Follow.CAFile, []any{"follow", "ca_file"}})
}

// ExpandCredentials replaces the $CREDENTIALS_DIRECTORY/ prefix of every
// file key (password_file, token_file, control_token_file, TLS files) with
// dir, the service manager's $CREDENTIALS_DIRECTORY, which the binary
// passes in. A key naming a credential while dir is empty is an error at
// that key: the daemon was started without LoadCredential=. `plenum check`
// does not expand: it notes such files as absent on its machine.
func (c *Config) ExpandCredentials(dir string) error {
	var errs Errors
	for _, f := range c.files() {
		for _, pre := range credentialPrefixes {
			rest, ok := strings.CutPrefix(*f.p, pre)
			if !ok {
				continue
			}
			if dir == "" {
				errs = append(errs, c.At(fmt.Sprintf("%s names a systemd credential, but CREDENTIALS_DIRECTORY is not set: start the daemon from its unit, which loads the credentials (LoadCredential=), or name the file itself", *f.p), f.path...))
				break
			}
			*f.p = filepath.Join(dir, rest)
			break
		}
	}
	if len(errs) > 0 {
		return errs
	}
	return nil
}
