package config

import (
	"bytes"
	"fmt"
	"math"
	"strconv"
	"strings"

	"gonum.org/v1/gonum/mat"
	"gopkg.in/yaml.v3"
)

// RewriteNoise returns the plant file data (named filename, for errors)
// with its noise replaced: process, as declared (a continuous intensity
// when the file's process noise is continuous, else the covariance of one
// sample), and measurement. Each keeps the form the file used: standard
// deviations (the square roots of the diagonal; the off-diagonal elements
// must then be zero) or a covariance matrix. note, when not empty, becomes
// a comment above the `noise` key (the provenance of the new values),
// replacing any comment there. Everything else — keys, order, comments
// elsewhere — is kept as the YAML encoder writes it back. Numbers are
// written with four significant digits.
func RewriteNoise(filename string, data []byte, process, measurement *mat.SymDense, note string) ([]byte, error) {
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		return nil, fmt.Errorf("config: %s: %w", filename, err)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 || doc.Content[0].Kind != yaml.MappingNode {
		return nil, fmt.Errorf("config: %s: not a plant file (want a mapping at the top)", filename)
	}
	root := doc.Content[0]
	noiseKey, noise := mappingValue(root, "noise")
	if noise == nil || noise.Kind != yaml.MappingNode {
		return nil, fmt.Errorf("config: %s: no noise mapping", filename)
	}
	for _, part := range []struct {
		key string
		m   *mat.SymDense
	}{{"process", process}, {"measurement", measurement}} {
		_, v := mappingValue(noise, part.key)
		if v == nil || v.Kind != yaml.MappingNode {
			return nil, fmt.Errorf("config: %s: no noise.%s mapping", filename, part.key)
		}
		k := v.Content
		done := false
		for i := 0; i+1 < len(k); i += 2 {
			var repl *yaml.Node
			switch k[i].Value {
			case "std":
				n := part.m.SymmetricDim()
				row := &yaml.Node{Kind: yaml.SequenceNode, Style: yaml.FlowStyle}
				for a := 0; a < n; a++ {
					for b := a + 1; b < n; b++ {
						if part.m.At(a, b) != 0 {
							return nil, fmt.Errorf("config: %s: noise.%s is given as std, but the new covariance has element (%d, %d) = %g off the diagonal", filename, part.key, a+1, b+1, part.m.At(a, b))
						}
					}
					row.Content = append(row.Content, noiseNumber(math.Sqrt(math.Max(part.m.At(a, a), 0))))
				}
				repl = row
			case "covariance":
				n := part.m.SymmetricDim()
				rows := &yaml.Node{Kind: yaml.SequenceNode}
				for a := 0; a < n; a++ {
					row := &yaml.Node{Kind: yaml.SequenceNode, Style: yaml.FlowStyle}
					for b := 0; b < n; b++ {
						row.Content = append(row.Content, noiseNumber(part.m.At(a, b)))
					}
					rows.Content = append(rows.Content, row)
				}
				repl = rows
			default:
				continue
			}
			repl.LineComment = k[i+1].LineComment
			k[i+1] = repl
			done = true
		}
		if !done {
			return nil, fmt.Errorf("config: %s: noise.%s has neither std nor covariance", filename, part.key)
		}
	}
	if note != "" {
		noiseKey.HeadComment = "# " + strings.ReplaceAll(strings.TrimRight(note, "\n"), "\n", "\n# ")
	}
	var buf bytes.Buffer
	enc := yaml.NewEncoder(&buf)
	enc.SetIndent(2)
	if err := enc.Encode(&doc); err != nil {
		return nil, fmt.Errorf("config: %s: %w", filename, err)
	}
	if err := enc.Close(); err != nil {
		return nil, fmt.Errorf("config: %s: %w", filename, err)
	}
	return buf.Bytes(), nil
}

// mappingValue returns the key and value nodes of key in mapping m, nils
// when absent.
func mappingValue(m *yaml.Node, key string) (k, v *yaml.Node) {
	for i := 0; i+1 < len(m.Content); i += 2 {
		if m.Content[i].Value == key {
			return m.Content[i], m.Content[i+1]
		}
	}
	return nil, nil
}

func noiseNumber(v float64) *yaml.Node {
	return &yaml.Node{Kind: yaml.ScalarNode, Value: strconv.FormatFloat(v, 'g', 4, 64)}
}
