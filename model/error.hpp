// Credence's error taxonomy. Every module of model/, server/, cli/ and
// report/ throws these; the CLI turns them into exit codes (cli/main.cpp) and
// the server into problem answers (server/problem.hpp).
//
// Two kinds of failure, never mixed:
//
// 1. What a user can fix: a credence::Error. Its message names the input
//    (file, line, option, section) and, where it can, what to do.
//      DataError     the data is unusable: ratings, validation or catalogue
//                    rows, fold-in ratings, database rows.        exit 1, HTTP 400
//      FileError     a file or folder cannot be found, read, written or
//                    renamed (missing, permissions, disk full).  exit 1
//      FormatError   a Credence file (posterior, comparison) is truncated,
//                    corrupt or of another version.               exit 1
//      NumericError  the sampler met a state it cannot continue from (a
//                    precision that is not positive definite); the message
//                    carries chain, sweep and row.                exit 1
//      OptionError   an option or request value that cannot work: rank 0,
//                    a level outside (0, 1), conflicting flags.   exit 2, HTTP 400
//
// 2. A programming error (a bug in Credence, never the user's doing): a
//    broken precondition between modules, such as an index out of range or
//    spans of different lengths. These throw std::logic_error or one of its
//    standard children (std::invalid_argument, std::out_of_range,
//    std::domain_error). The CLI reports them as an internal error with exit
//    code 70 (EX_SOFTWARE in BSD's sysexits.h) and asks for a report; the
//    server answers 500 without internals. Code that checks user input must
//    never throw these: check first and throw an Error above.
#pragma once
#include <stdexcept>
#include <string>

namespace credence {

// Base of every failure a user can act on. Catch this to report a message.
class Error : public std::runtime_error {
public:
    using std::runtime_error::runtime_error;
};

// Input data was unusable (ingest, validation files, catalogues, fold-in ratings).
class DataError : public Error {
public:
    using Error::Error;
};

// A file or folder could not be found, read, written or renamed.
class FileError : public Error {
public:
    using Error::Error;
};

// A posterior (or other Credence) file was truncated, corrupt or of another version.
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

// An option or request parameter has a value that cannot work (the message
// names the option and the accepted range).
class OptionError : public Error {
public:
    using Error::Error;
};

}  // namespace credence
