// UNTESTED: Kotlin is not installed on the machine this was written on. The same native methods are
// exercised from Java by tests/test_native.py (org/example/nextword/NextwordNative.java + Demo.java).
//
// A Kotlin caller of the JNI shim nextword_jni.c: load the model once, one Session per thread
// (e.g. the input method's main thread), suggest on every keystroke.
package org.example.nextword

import java.io.Closeable

object NextwordNative {
    init { System.loadLibrary("nextword_jni") }   // libnextword_jni.so in the APK's jniLibs/<abi>/

    @JvmStatic external fun open(path: ByteArray): Long
    @JvmStatic external fun close(model: Long)
    @JvmStatic external fun sessionNew(model: Long): Long
    @JvmStatic external fun sessionFree(session: Long)
    @JvmStatic external fun suggest(session: Long, text: ByteArray, k: Int, probs: DoubleArray): ByteArray?
}

data class Suggestion(val word: String, val prob: Double)

/** A model file opened read-only (memory-mapped); share it between threads. */
class NextwordModel(path: String) : Closeable {
    internal val handle: Long = NextwordNative.open(path.toByteArray(Charsets.UTF_8))
    override fun close() = NextwordNative.close(handle)
}

/** Per-thread query state: not thread safe, allocates nothing per call on the native side. */
class Session(model: NextwordModel) : Closeable {
    private val handle = NextwordNative.sessionNew(model.handle)
    private val probs = DoubleArray(64)

    fun suggest(typed: String, k: Int = 3): List<Suggestion> {
        val words = NextwordNative.suggest(handle, typed.toByteArray(Charsets.UTF_8), k, probs) ?: return emptyList()
        if (words.isEmpty()) return emptyList()
        return String(words, Charsets.UTF_8).split('\u0000').mapIndexed { i, w -> Suggestion(w, probs[i]) }
    }

    override fun close() = NextwordNative.sessionFree(handle)
}

fun main(args: Array<String>) {
    NextwordModel(args[0]).use { model ->
        Session(model).use { session ->
            for (typed in args.drop(1)) println("$typed -> ${session.suggest(typed)}")
        }
    }
}
