// Command genmodel writes a large synthetic encoder model directory whose
// one tensor file is about -mib MiB (benchmarks only: random weights, not
// a scenario), for timing push, pull, verify, show and score on a model
// far larger than the demo's:
//
//	go run ./bench/genmodel -mib 200 -out DIR
//
// The encoder maps a vocabulary of shows through one sparse × dense layer
// 768 wide (internal/fixture/bigmodel: random normal weights, fixed seed).
package main

import (
	"flag"
	"fmt"
	"os"

	"github.com/modelgate/modelgate/internal/fixture/bigmodel"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

func main() {
	mib := flag.Int("mib", 200, "size of the tensor file in MiB")
	out := flag.String("out", "", "model directory to write")
	seed := flag.Uint64("seed", 1, "seed")
	flag.Parse()
	if *out == "" || *mib < 1 {
		flag.Usage()
		os.Exit(2)
	}
	if err := run(*mib, *out, *seed); err != nil {
		fmt.Fprintln(os.Stderr, "genmodel:", err)
		os.Exit(1)
	}
}

func run(mib int, out string, seed uint64) error {
	return modeldir.Write(out, bigmodel.Encoder(mib, seed, 1.0/16))
}
