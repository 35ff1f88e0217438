// UNTESTED: no Swift compiler on the machine this was written on.
// A Swift caller of the nextword C API: open the model once (share it between threads), one
// Session per thread, suggest on every keystroke. Usage: Demo MODEL TEXT...
import CNextword

struct NextwordError: Error, CustomStringConvertible {
    let code: nw_status
    let description: String
}

private func check(_ status: nw_status, _ err: nw_error) throws {
    guard status == NW_OK else {
        let message = withUnsafeBytes(of: err.message) { String(decoding: $0.prefix(while: { $0 != 0 }), as: UTF8.self) }
        throw NextwordError(code: status, description: message)
    }
}

/// A model file, memory-mapped read-only; safe to share between threads.
final class NextwordModel {
    let handle: OpaquePointer
    init(path: String) throws {
        var model: OpaquePointer?
        var err = nw_error()
        try check(nw_open(path, &model, &err), err)
        handle = model!
    }
    deinit { nw_close(handle) }
}

/// Per-thread query state (not thread safe); the C side allocates nothing per call.
final class Session {
    private let handle: OpaquePointer
    private let model: NextwordModel  // keeps the model open while the session lives
    private var out = [nw_suggestion](repeating: nw_suggestion(), count: Int(NW_MAX_K))
    private var buf = [CChar](repeating: 0, count: 8192)

    init(model: NextwordModel) throws {
        var s: OpaquePointer?
        var err = nw_error()
        try check(nw_session_new(model.handle, &s, &err), err)
        handle = s!
        self.model = model
    }
    deinit { nw_session_free(handle) }

    func suggest(_ typed: String, k: Int = 3) throws -> [(word: String, prob: Double)] {
        var n = 0
        var err = nw_error()
        let status = typed.withCString { ptr in
            nw_suggest(handle, ptr, typed.utf8.count, Int32(k), &out, &n, &buf, buf.count, &err)
        }
        try check(status, err)
        return (0..<n).map { i in (String(cString: out[i].word), out[i].prob) }
    }
}

let args = CommandLine.arguments
let model = try NextwordModel(path: args[1])
let session = try Session(model: model)
for typed in args.dropFirst(2) {
    let shown = try session.suggest(typed).map { "\($0.word) (\(String(format: "%.3f", $0.prob)))" }
    print("\(typed) -> \(shown.joined(separator: "  "))")
}
