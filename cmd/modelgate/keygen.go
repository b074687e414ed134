package main

import (
	"fmt"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"modelgate/internal/release"
)

type keygenOptions struct {
	Out  string
	Name string
}

func (o *keygenOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Out, "out", "", "write PREFIX.key.pem (private, mode 0600) and PREFIX.pub.pem (required)")
	cmd.Flags().StringVar(&o.Name, "name", "", "who holds the key (default: the base name of PREFIX)")
}

func newKeygenCmd(g *globals) *cobra.Command {
	o := &keygenOptions{}
	cmd := &cobra.Command{
		Use:   "keygen --out PREFIX [--name NAME]",
		Short: "Make an ed25519 key pair for approvals, release records and signed gate reports",
		Long: `keygen makes an ed25519 key pair: PREFIX.key.pem, the private key (PKCS#8
PEM, mode 0600: keep it secret), and PREFIX.pub.pem, the public key (PKIX
PEM) to list in a policy. It prints the key id — the first 16 hex digits of
the sha256 of the public key's DER encoding — and never prints the private
key. Existing files are never overwritten.`,
		Args: exactArgs(0, "(none)"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runKeygen(g, o)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runKeygen(g *globals, o *keygenOptions) error {
	if o.Out == "" {
		return usageErr("keygen needs --out PREFIX")
	}
	name := o.Name
	if name == "" {
		name = strings.TrimSuffix(filepath.Base(o.Out), filepath.Ext(o.Out))
	}
	k, err := release.GenerateKey(name)
	if err != nil {
		return err
	}
	priv, pub, err := release.WriteKeyFiles(o.Out, k)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]string{"keyId": k.ID, "name": k.Name, "privateKey": priv, "publicKey": pub})
	}
	w := g.Stdout
	fmt.Fprintf(w, "key id:      %s\nname:        %s\nprivate key: %s (keep it secret)\npublic key:  %s\n", k.ID, k.Name, priv, pub)
	fmt.Fprintf(w, "\nList it in a policy's approvals (keyFile is relative to the policy file):\n  - name: %s\n    keyFile: %s\n    keyId: \"%s\"   # quoted: a key id of digits alone would read as a number\n", k.Name, filepath.ToSlash(pub), k.ID)
	return nil
}
