// Errors a user can act on. Every failure that reaches a person (bad input
// file, corrupt posterior, impossible option) is a credence::Error whose
// message says what was wrong and, where possible, what to do about it.
#pragma once
#include <stdexcept>
#include <string>

namespace credence {

class Error : public std::runtime_error {
public:
    using std::runtime_error::runtime_error;
};

// Input data was unusable (ingest, validation files, fold-in ratings).
class DataError : public Error {
public:
    using Error::Error;
};

// A posterior file was missing, truncated, corrupt or of another version.
class FormatError : public Error {
public:
    using Error::Error;
};

// The sampler met a state it cannot continue from (e.g. a matrix that is not
// positive definite); the message carries the chain, sweep and row.
class NumericError : public Error {
public:
    using Error::Error;
};

}  // namespace credence
