package main

import (
	"errors"
	"flag"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
)

// natsFlags are the connection flags of every verb that talks to NATS (run,
// ctl, record, simulate): one definition, so that each takes the same ones.
type natsFlags struct {
	url                    string
	creds, nkey, userFile  string
	tlsCA, tlsCert, tlsKey string
}

// register adds the flags to fs; urlHelp describes --nats for the verb.
func (f *natsFlags) register(fs *flag.FlagSet, urlHelp string) {
	fs.StringVar(&f.url, "nats", "", urlHelp)
	fs.StringVar(&f.creds, "creds", "", "NATS user credentials `FILE` (JWT and seed)")
	fs.StringVar(&f.nkey, "nkey", "", "NATS user NKey seed `FILE`")
	fs.StringVar(&f.userFile, "user-file", "", "`FILE` holding one line USER:PASSWORD for NATS, readable by its owner only (such as the nats.user a daemon writes)")
	fs.StringVar(&f.tlsCA, "tls-ca", "", "PEM `FILE` of the CAs that sign the NATS server's certificate")
	fs.StringVar(&f.tlsCert, "tls-cert", "", "PEM client certificate `FILE` for NATS (with --tls-key)")
	fs.StringVar(&f.tlsKey, "tls-key", "", "PEM client key `FILE` for NATS (with --tls-cert)")
}

// credentials reports whether a credential or TLS flag was given.
func (f *natsFlags) credentials() bool {
	return f.creds != "" || f.nkey != "" || f.userFile != "" || f.tlsCA != "" || f.tlsCert != "" || f.tlsKey != ""
}

// busOptions returns the flags as the daemon's bus options.
func (f *natsFlags) busOptions() daemon.BusOptions {
	return daemon.BusOptions{
		URL: f.url, CredsFile: f.creds, NKeyFile: f.nkey, UserFile: f.userFile,
		TLSCA: f.tlsCA, TLSCert: f.tlsCert, TLSKey: f.tlsKey,
	}
}

// errTryNext tells dial that a connection works but is not the one wanted
// (no daemon there answers): try the next local server.
var errTryNext = errors.New("not this server")

// dial connects a client verb. With --nats or a credential flag it connects
// where they say (--nats defaulting to nats.DefaultURL). Without, it tries
// the embedded servers of this user's local daemons (daemon.FindLocal),
// newest first, with the local user each daemon wrote; then an anonymous
// connection to nats.DefaultURL. use, when not nil, is tried on each
// connection: errTryNext moves on to the next candidate, any other result
// ends the search. dial returns the connection and the (redacted) URL it is
// connected to; the caller closes it.
func (f *natsFlags) dial(timeout time.Duration, use func(*nats.Conn) error, extra ...nats.Option) (*nats.Conn, error) {
	type candidate struct {
		url  string
		opts daemon.BusOptions
		what string
	}
	var cands []candidate
	if f.url != "" || f.credentials() {
		o := f.busOptions()
		if o.URL == "" {
			o.URL = nats.DefaultURL
		}
		cands = append(cands, candidate{o.URL, o, "--nats"})
	} else {
		for _, l := range daemon.FindLocal() {
			cands = append(cands, candidate{l.URL, daemon.BusOptions{UserFile: l.UserFile}, "local daemon"})
		}
		cands = append(cands, candidate{nats.DefaultURL, daemon.BusOptions{}, "default"})
	}
	var errs []error
	for _, c := range cands {
		auth, err := daemon.ClientOptions(c.opts)
		if err != nil {
			if c.what == "local daemon" {
				errs = append(errs, fmt.Errorf("%s: %w", daemon.RedactURL(c.url), err))
				continue
			}
			return nil, usageError("%v", err)
		}
		opts := append([]nats.Option{nats.Timeout(timeout)}, extra...)
		nc, err := nats.Connect(c.url, append(opts, auth...)...)
		if err != nil {
			errs = append(errs, fmt.Errorf("%s: %w", daemon.RedactURL(c.url), err))
			continue
		}
		if use != nil {
			if err := use(nc); errors.Is(err, errTryNext) {
				nc.Close()
				errs = append(errs, fmt.Errorf("%s: %w", daemon.RedactURL(c.url), err))
				continue
			} else if err != nil {
				nc.Close()
				return nil, err
			}
		}
		return nc, nil
	}
	return nil, &exitError{code: 1, msg: fmt.Sprintf("cannot reach the bus: %v (is a server running? 'surmise run' and 'surmise demo' start one; without --nats, this user's local daemons are looked for under %s)",
		errors.Join(errs...), daemon.LocalRunDir())}
}
