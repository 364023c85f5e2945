//! The maths against outside references (numpy/scipy oracles, open data), offline
//! evaluation and ranking.

mod evaluation;
mod movielens_oracle;
mod ranking;
