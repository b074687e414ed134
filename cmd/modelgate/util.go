package main

import "modelgate/internal/errkind"

func usageErr(format string, args ...any) error {
	return errkind.New(errkind.BadInput, format, args...)
}
