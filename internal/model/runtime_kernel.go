package model

import (
	"fmt"

	"github.com/modelgate/modelgate/internal/model/kernel"
)

// activation is a layer's activation as the kernels take it.
type activation = kernel.Activation

func parseActivation(s string) (activation, error) {
	switch s {
	case "", ActIdentity:
		return kernel.Identity, nil
	case ActReLU:
		return kernel.ReLU, nil
	case ActSigmoid:
		return kernel.Sigmoid, nil
	case ActTanh:
		return kernel.Tanh, nil
	}
	return 0, fmt.Errorf("activation %q is not one of identity, relu, sigmoid, tanh", s)
}
