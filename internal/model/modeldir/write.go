package modeldir

import (
	"bytes"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/safetensors"
)

// Encode renders m as the files of a model directory, deterministically:
// the same model always gives the same bytes. It validates the spec first.
func Encode(m *Model) ([]File, error) {
	specBytes, err := json.MarshalIndent(m.Spec, "", "  ")
	if err != nil {
		return nil, fmt.Errorf("encoding spec: %w", err)
	}
	specBytes = append(specBytes, '\n')
	if _, vs, err := ParseSpec(specBytes); err != nil {
		return nil, err
	} else if len(vs) > 0 {
		return nil, errkind.New(errkind.BadInput, "spec of %q is invalid:\n  %s", m.Spec.Name, strings.Join(vs, "\n  "))
	}
	files := []File{{Name: SpecFile, Bytes: specBytes}}
	byFile := map[string][]safetensors.Tensor{}
	for _, t := range m.Spec.Tensors {
		data, ok := m.Tensors[t.Name]
		if !ok {
			return nil, errkind.New(errkind.BadInput, "tensor %q: no data", t.Name)
		}
		n := 1
		for _, d := range t.Shape {
			n *= d
		}
		if len(data) != n {
			return nil, errkind.New(errkind.BadInput, "tensor %q: %d values for shape %v", t.Name, len(data), t.Shape)
		}
		byFile[t.File] = append(byFile[t.File], safetensors.Tensor{Name: t.Name, DType: t.DType, Shape: t.Shape, Data: data})
	}
	names := make([]string, 0, len(byFile))
	for name := range byFile {
		names = append(names, name)
	}
	sort.Strings(names)
	for _, name := range names {
		b, err := safetensors.Encode(byFile[name], nil)
		if err != nil {
			return nil, fmt.Errorf("encoding %s: %w", name, err)
		}
		files = append(files, File{Name: name, Bytes: b})
	}
	var vocab bytes.Buffer
	for _, id := range m.Vocabulary {
		vocab.WriteString(id)
		vocab.WriteByte('\n')
	}
	files = append(files, File{Name: m.Spec.Inputs.Sparse[0].Vocabulary, Bytes: vocab.Bytes()})
	if name := m.Spec.Files.Stats; name != "" {
		b, err := json.MarshalIndent(m.Stats, "", "  ")
		if err != nil {
			return nil, fmt.Errorf("encoding %s: %w", name, err)
		}
		files = append(files, File{Name: name, Bytes: append(b, '\n')})
	}
	if name := m.Spec.Files.Probes; name != "" {
		var buf bytes.Buffer
		enc := json.NewEncoder(&buf)
		for _, p := range m.Probes {
			if err := enc.Encode(p); err != nil {
				return nil, fmt.Errorf("encoding %s: %w", name, err)
			}
		}
		files = append(files, File{Name: name, Bytes: buf.Bytes()})
	}
	return files, nil
}

// Write writes m as a model directory at dir (created if missing; files of
// the same names are replaced) and reads it back to validate it.
func Write(dir string, m *Model) error {
	files, err := Encode(m)
	if err != nil {
		return err
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return err
	}
	for _, f := range files {
		if err := os.WriteFile(filepath.Join(dir, f.Name), f.Bytes, 0o644); err != nil {
			return err
		}
	}
	_, err = Read(dir)
	return err
}

// Tensor returns the spec entry for a tensor name.
func Tensor(s *model.Spec, name string) (model.Tensor, bool) {
	for _, t := range s.Tensors {
		if t.Name == name {
			return t, true
		}
	}
	return model.Tensor{}, false
}
