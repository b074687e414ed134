// Package policies embeds the example policies (the *.yaml files beside
// this file), so that the demo can write them out with its own keys.
package policies

import "embed"

// FS holds the example policy files, by file name.
//
//go:embed *.yaml
var FS embed.FS
