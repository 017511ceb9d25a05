package daemon

import (
	"bufio"
	"crypto/rand"
	"encoding/base64"
	"fmt"
	"net/url"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	"github.com/nats-io/nats-server/v2/server"
)

// Local access to the embedded server.
//
// The embedded server admits two kinds of client. Anonymous clients (no
// credentials) may publish on the subjects the plants wire and subscribe to
// the estimates, nothing else: a plant bridge or a dashboard on the host
// needs no secret, and cannot steer an estimator. Everything else — the
// control service, JetStream (recordings, leases), any other subject —
// needs the local user, whose password the daemon draws at random at each
// start and writes, readable by its own user only, into two files:
//
//	nats.url    the URL where the embedded server listens
//	nats.user   "USER:PASSWORD", the form of --user-file
//
// in its run directory, LocalRunDir()/PORT, where `surmise ctl`, `record`
// and `simulate` of the same user look for them (FindLocal); and, when the
// daemon has a state directory, in that directory too, where an operator
// finds them to hand to another user.

// LocalUser is the name of the embedded server's local user.
const LocalUser = "surmise-local"

// anonymousUser is the embedded server's user of clients without
// credentials.
const anonymousUser = "anonymous"

// Names of the local access files.
const (
	LocalURLFile  = "nats.url"
	LocalUserFile = "nats.user"
)

// LocalAccess is what the daemon writes for local clients: the server's URL
// and the local user's password.
type LocalAccess struct {
	URL      string
	User     string
	Password string
}

// newLocalPassword draws a random password (192 bits).
func newLocalPassword() (string, error) {
	b := make([]byte, 24)
	if _, err := rand.Read(b); err != nil {
		return "", fmt.Errorf("drawing the local password: %w", err)
	}
	return base64.RawURLEncoding.EncodeToString(b), nil
}

// LocalRunDir is the directory under which daemons of this user write their
// local access files, one subdirectory per port: $XDG_RUNTIME_DIR/surmise,
// or without XDG_RUNTIME_DIR, surmise-UID in the temporary directory.
func LocalRunDir() string {
	if d := os.Getenv("XDG_RUNTIME_DIR"); d != "" {
		return filepath.Join(d, "surmise")
	}
	return filepath.Join(os.TempDir(), fmt.Sprintf("surmise-%d", os.Getuid()))
}

// privateDir creates dir (and its parents) with mode 0700 and checks that it
// belongs to this user and nobody else may enter it.
func privateDir(dir string) error {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return err
	}
	fi, err := os.Lstat(dir)
	if err != nil {
		return err
	}
	if !fi.IsDir() {
		return fmt.Errorf("%s is not a directory", dir)
	}
	if owner, ok := fileOwner(fi); ok && owner != os.Getuid() {
		return fmt.Errorf("%s belongs to user %d, not to this user (%d)", dir, owner, os.Getuid())
	}
	if fi.Mode().Perm()&0o077 != 0 {
		if err := os.Chmod(dir, 0o700); err != nil {
			return err
		}
	}
	return nil
}

// writePrivate writes data to path with mode 0600, atomically (a reader never
// sees half a file, nor a file another user could read).
func writePrivate(path string, data []byte) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), ".tmp-"+filepath.Base(path)+"-*")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name())
	if err := tmp.Chmod(0o600); err != nil {
		tmp.Close()
		return err
	}
	if _, err := tmp.Write(data); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Close(); err != nil {
		return err
	}
	return os.Rename(tmp.Name(), path)
}

// writeLocalAccess writes the access files into dir (created private).
func writeLocalAccess(dir string, a LocalAccess) error {
	if err := privateDir(dir); err != nil {
		return fmt.Errorf("local access directory: %w", err)
	}
	if err := writePrivate(filepath.Join(dir, LocalUserFile), []byte(a.User+":"+a.Password+"\n")); err != nil {
		return fmt.Errorf("local access: %w", err)
	}
	if err := writePrivate(filepath.Join(dir, LocalURLFile), []byte(a.URL+"\n")); err != nil {
		return fmt.Errorf("local access: %w", err)
	}
	return nil
}

// removeLocalAccess removes the access files of dir, and dir itself when it
// is a run directory (under LocalRunDir) left empty.
func removeLocalAccess(dir string) {
	os.Remove(filepath.Join(dir, LocalUserFile))
	os.Remove(filepath.Join(dir, LocalURLFile))
	if filepath.Dir(dir) == LocalRunDir() {
		os.Remove(dir) // only when empty
	}
}

// LocalBus is a daemon's embedded server found by FindLocal.
type LocalBus struct {
	URL      string
	UserFile string    // the nats.user file, for BusOptions.UserFile
	Written  time.Time // when the daemon wrote it
}

// FindLocal lists the embedded servers of this user's daemons on this host,
// newest first, from the access files under LocalRunDir. A daemon that was
// killed leaves its files behind: callers try each in turn.
func FindLocal() []LocalBus {
	dirs, _ := filepath.Glob(filepath.Join(LocalRunDir(), "*", LocalURLFile))
	var out []LocalBus
	for _, p := range dirs {
		b, err := os.ReadFile(p)
		if err != nil {
			continue
		}
		fi, err := os.Stat(p)
		if err != nil {
			continue
		}
		u := strings.TrimSpace(string(b))
		if u == "" {
			continue
		}
		out = append(out, LocalBus{URL: u, UserFile: filepath.Join(filepath.Dir(p), LocalUserFile), Written: fi.ModTime()})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Written.After(out[j].Written) })
	return out
}

// ReadUserFile reads a file of the form "USER:PASSWORD" (one line; the
// password may contain colons). It refuses a file that other users may
// read.
func ReadUserFile(path string) (user, password string, err error) {
	f, err := os.Open(path)
	if err != nil {
		return "", "", fmt.Errorf("user file: %w", err)
	}
	defer f.Close()
	if fi, err := f.Stat(); err == nil && fi.Mode().Perm()&0o077 != 0 {
		return "", "", fmt.Errorf("user file %s: mode %v lets other users read the password; chmod 600 it", path, fi.Mode().Perm())
	}
	sc := bufio.NewScanner(f)
	if !sc.Scan() {
		return "", "", fmt.Errorf("user file %s: empty; want one line USER:PASSWORD", path)
	}
	user, password, ok := strings.Cut(strings.TrimSpace(sc.Text()), ":")
	if !ok || user == "" || password == "" {
		return "", "", fmt.Errorf("user file %s: line 1: want USER:PASSWORD", path)
	}
	return user, password, nil
}

// anonymousPermissions are those of a client without credentials on the
// embedded server: publish on the plants' wired subjects, subscribe to the
// estimates (active and shadow), and publish a simulated plant's true
// states.
func anonymousPermissions(plants []PlantSpec) *server.Permissions {
	pub, sub := []string{}, []string{}
	for _, p := range plants {
		for _, w := range p.Plant.Inputs {
			pub = append(pub, w.Subject)
		}
		for _, w := range p.Plant.Outputs {
			pub = append(pub, w.Subject)
		}
		// A simulated plant's true states (surmise simulate): nothing
		// live reads them, a replay compares with them.
		for _, st := range p.Plant.Model.States {
			pub = append(pub, p.Plant.TruthSubject(st.Name))
		}
		sub = append(sub, EstimateSubject(p.Plant), ShadowSubject(EstimateSubject(p.Plant)))
	}
	return &server.Permissions{
		Publish:   &server.SubjectPermission{Allow: pub},
		Subscribe: &server.SubjectPermission{Allow: sub},
	}
}

// RedactURL returns the URLs of s (one, or several separated by commas)
// with any password replaced by "xxxxx", for printing and logging.
func RedactURL(s string) string {
	parts := strings.Split(s, ",")
	for i, p := range parts {
		p = strings.TrimSpace(p)
		u, err := url.Parse(p)
		if err != nil || u.User == nil {
			if err != nil && strings.Contains(p, "@") {
				p = "(unparsable URL, hidden)"
			}
			parts[i] = p
			continue
		}
		if _, has := u.User.Password(); has {
			u.User = url.UserPassword(u.User.Username(), "xxxxx")
		} else if u.User.Username() != "" {
			// A token in the user part is a secret too.
			u.User = url.User("xxxxx")
		}
		parts[i] = u.String()
	}
	return strings.Join(parts, ",")
}

// writeLocalAccess writes the local access files of the daemon's embedded
// server: in its run directory (LocalRunDir()/PORT), where local clients of
// the same user look, and in the state directory when one was given. It
// returns the run directory, or "" when it could not write it (logged:
// local clients then need --nats and --user-file).
func (d *Daemon) writeLocalAccess(a LocalAccess) string {
	port := "unknown"
	if u, err := url.Parse(a.URL); err == nil {
		port = u.Port()
	}
	run := filepath.Join(LocalRunDir(), port)
	if err := writeLocalAccess(run, a); err != nil {
		d.log.Warn("local access files not written: local clients need --nats and --user-file", "error", err)
		run = ""
	} else {
		d.localDirs = append(d.localDirs, run)
		d.log.Info("local access files written (owner only): surmise ctl, record and simulate of this user find the bus there", "dir", run)
	}
	if sd := d.opts.StateDir; sd != "" {
		if err := writeLocalAccess(sd, a); err != nil {
			d.log.Warn("local access files not written to the state directory", "error", err)
		} else {
			d.localDirs = append(d.localDirs, sd)
		}
	}
	return run
}
