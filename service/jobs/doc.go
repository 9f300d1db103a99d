// Package jobs is the domain of beliefd's job service: job records and their
// states, the work plan of a job (numbered blocks of samples, or one unit for
// exact inference and Gibbs sampling), the merging of block statistics in
// block order, stopping decisions on merged prefixes, and the Store
// interface that the memory and Redis backends implement.
package jobs
