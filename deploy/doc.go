// Package deploy holds no code: it is the home of Surmise's deployment kit and of the tests
// that check it.
//
// # Contents
//
//   - prometheus/: a scrape configuration, recording and alerting rules, and their promtool
//     unit tests (rules_test.yml).
//   - systemd/: the service unit (Type=notify, watchdog, reload by SIGHUP, sandboxing).
//   - kubernetes/: a Deployment per plant, its ConfigMap, a headless metrics Service, a
//     kustomization.
//   - nats/: a three-node NATS cluster with JetStream, and the accounts and permissions of
//     the daemons, engineers, dashboards and plant bridges.
//
// README.md beside this file is the operations guide.
//
// # Tests
//
// go test ./deploy runs promtool (check rules, test rules, check config), systemd-analyze
// (verify, security), parses every Kubernetes manifest and checks its structure, parses the
// NATS configurations with the server's own parser and starts a server from them to check
// every user's permissions with real clients. A test that needs an outside program skips
// when it is absent and fails instead when CI=true (.ci/run installs them all).
package deploy
