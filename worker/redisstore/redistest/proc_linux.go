package redistest

import "syscall"

// sysProcAttr makes the kernel kill the server if the test process dies
// without stopping it.
func sysProcAttr() *syscall.SysProcAttr {
	return &syscall.SysProcAttr{Pdeathsig: syscall.SIGKILL}
}
