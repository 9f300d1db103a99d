package jobs

// SetHookUnit installs a function that runs in the goroutine of every work
// unit before it computes (tests only).
func SetHookUnit(s *Service, h func(j *Job, block int64)) { s.hookUnit = h }
