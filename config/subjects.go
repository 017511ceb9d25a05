package config

// PublishPrefix returns the prefix of the subjects the plant's estimator
// publishes on: the plant file's `publish` key, or "surmise.<name>" when it
// has none (LoadPlant fills it in; a Plant built in code may leave it
// empty). Its estimates go to "<prefix>.estimate".
func (p *Plant) PublishPrefix() string {
	if p.Publish != "" {
		return p.Publish
	}
	return PublishRoot + "." + p.Name
}

// TruthSubject returns the subject on which a simulated plant publishes the
// true value of a state: "<publish prefix>.truth.<state>" (by default
// surmise.<name>.truth.<state>). The simulator publishes there, and a replay
// of a bus recording that holds these subjects compares the estimates with
// them.
func (p *Plant) TruthSubject(state string) string {
	return p.PublishPrefix() + ".truth." + state
}

// TruthColumn returns the CSV column name of the true value of a state,
// "truth.<state>": the simulator writes it, and a replay of a CSV recording
// reads it.
func TruthColumn(state string) string { return "truth." + state }
