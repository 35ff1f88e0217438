/* JNI shim over the nextword C API for Android/JVM callers (Kotlin: NextwordNative.kt,
 * Java: org/example/nextword/NextwordNative.java, the same native methods).
 *
 * Text crosses the boundary as UTF-8 byte arrays, not jstring: JNI's own UTF conversion is
 * "modified UTF-8" (supplementary characters as surrogate pairs), which is not the UTF-8
 * the library and its model files use. Words come back NUL-separated in one byte array.
 *
 * Threads: one model (nw_model) may be shared; each thread needs its own session.
 * Build (Linux, as tests/test_native.py does):
 *   cc -shared -fPIC -Wall -Wextra -Werror -I$JAVA_HOME/include -I$JAVA_HOME/include/linux \
 *      -I../../native/include nextword_jni.c -L<build> -lnextword -o libnextword_jni.so
 */
#include <jni.h>
#include <stdint.h>
#include <string.h>

#include "nextword.h"

static void throw_error(JNIEnv *env, const nw_error *err) {
    jclass cls = (*env)->FindClass(env, err->code == NW_E_ARG ? "java/lang/IllegalArgumentException" : "java/io/IOException");
    if (cls) (*env)->ThrowNew(env, cls, err->message);
}

JNIEXPORT jlong JNICALL Java_org_example_nextword_NextwordNative_open(JNIEnv *env, jclass cls, jbyteArray path) {
    (void)cls;
    jsize n = (*env)->GetArrayLength(env, path);
    char buf[4096];
    if (n <= 0 || n >= (jsize)sizeof buf) {
        nw_error e = {NW_E_ARG, "path is empty or too long"};
        throw_error(env, &e);
        return 0;
    }
    (*env)->GetByteArrayRegion(env, path, 0, n, (jbyte *)buf);
    buf[n] = 0;
    nw_model *m = NULL;
    nw_error err;
    if (nw_open(buf, &m, &err) != NW_OK) {
        throw_error(env, &err);
        return 0;
    }
    return (jlong)(intptr_t)m;
}

JNIEXPORT void JNICALL Java_org_example_nextword_NextwordNative_close(JNIEnv *env, jclass cls, jlong model) {
    (void)env; (void)cls;
    nw_close((nw_model *)(intptr_t)model);
}

JNIEXPORT jlong JNICALL Java_org_example_nextword_NextwordNative_sessionNew(JNIEnv *env, jclass cls, jlong model) {
    (void)cls;
    nw_session *s = NULL;
    nw_error err;
    if (nw_session_new((const nw_model *)(intptr_t)model, &s, &err) != NW_OK) {
        throw_error(env, &err);
        return 0;
    }
    return (jlong)(intptr_t)s;
}

JNIEXPORT void JNICALL Java_org_example_nextword_NextwordNative_sessionFree(JNIEnv *env, jclass cls, jlong session) {
    (void)env; (void)cls;
    nw_session_free((nw_session *)(intptr_t)session);
}

/* words as UTF-8, NUL-separated; probs[i] receives the i-th probability (probs.length >= k) */
JNIEXPORT jbyteArray JNICALL Java_org_example_nextword_NextwordNative_suggest(JNIEnv *env, jclass cls, jlong session,
                                                                               jbyteArray text, jint k, jdoubleArray probs) {
    (void)cls;
    if (k < 1 || k > NW_MAX_K || (*env)->GetArrayLength(env, probs) < k) {
        nw_error e = {NW_E_ARG, "k must be in [1, 64] and probs must have room for k values"};
        throw_error(env, &e);
        return NULL;
    }
    jsize n = (*env)->GetArrayLength(env, text);
    /* the library reads at most the last 256 characters (4 bytes each at most): the last 1,032
     * bytes hold them and at least one more character when the text has more, so the library
     * still sees that the text was cut */
    jsize from = n > 1032 ? n - 1032 : 0;
    char in[1032];
    (*env)->GetByteArrayRegion(env, text, from, n - from, (jbyte *)in);
    size_t start = 0;
    while (start < (size_t)(n - from) && ((unsigned char)in[start] & 0xC0) == 0x80) start++; /* a whole character */
    nw_suggestion out[NW_MAX_K];
    char buf[NW_MAX_K * 128];
    size_t got = 0;
    nw_error err;
    if (nw_suggest((nw_session *)(intptr_t)session, in + start, (size_t)(n - from) - start, (int)k, out, &got, buf, sizeof buf,
                   &err) != NW_OK) {
        throw_error(env, &err);
        return NULL;
    }
    size_t total = 0;
    double p[NW_MAX_K];
    for (size_t i = 0; i < got; i++) {
        total += out[i].len + 1;
        p[i] = out[i].prob;
    }
    (*env)->SetDoubleArrayRegion(env, probs, 0, (jsize)got, p);
    jbyteArray words = (*env)->NewByteArray(env, (jsize)(total ? total - 1 : 0));
    if (!words) return NULL;
    size_t at = 0;
    for (size_t i = 0; i < got; i++) { /* the words are NUL-terminated in buf, back to back */
        (*env)->SetByteArrayRegion(env, words, (jsize)at, (jsize)(out[i].len + (i + 1 < got)), (const jbyte *)out[i].word);
        at += out[i].len + 1;
    }
    return words;
}
