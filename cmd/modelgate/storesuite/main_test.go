package storesuite

import (
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

// The helpers of these black-box tests (MG, MustMG, the store kinds, the
// release world, the crash runner) live in internal/clitest, shared with
// the other packages that run the built binary.

func TestMain(m *testing.M) { clitest.Main(m) }
